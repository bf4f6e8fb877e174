package training

import (
	"errors"
	"math"
	"regexp"
	"strings"
	"testing"
)

func ptr(f float64) *float64 { return &f }

func TestValidateAndEncodeEpisodesPacksColumns(t *testing.T) {
	s := Settings{Actions: []string{"left", "right"}}
	recs, err := ValidateAndEncodeEpisodes(s, []Episode{
		{ID: "a", Steps: []Step{{State: "s1", Action: "right", Reward: 1}, {State: "s2", Action: "left", Reward: -2, Probability: ptr(0.25)}}},
		{ID: "b", Steps: []Step{{State: "s3", Action: "left", Reward: 0.5}}},
	}, DefaultLimits())
	if err != nil {
		t.Fatal(err)
	}
	if len(recs) != 2 || recs[0].Actions[0] != 1 || recs[0].Actions[1] != 0 || recs[1].States[0] != "s3" {
		t.Fatalf("records %+v", recs)
	}
	if got := recs[0].Probabilities; len(got) != 2 || got[0] != 0 || got[1] != 0.25 {
		t.Fatalf("probabilities %v, want [0 0.25]", got)
	}
	if recs[1].Probabilities != nil {
		t.Fatalf("episode without probabilities has %v", recs[1].Probabilities)
	}
	// Appending to one record's column must not spill into the next.
	recs[0].States = append(recs[0].States, "x")
	if recs[1].States[0] != "s3" {
		t.Fatal("records share writable backing arrays")
	}
}

func TestValidateAndEncodeEpisodesReportsEveryProblemWithItsPlace(t *testing.T) {
	s := Settings{Actions: []string{"left", "right"}}
	lim := Limits{MaxEpisodes: 10, MaxSteps: 3, MaxIDLength: 8, MaxStateLength: 4}
	_, err := ValidateAndEncodeEpisodes(s, []Episode{
		{ID: "", Steps: []Step{{State: "s", Action: "up", Reward: math.NaN()}}},
		{ID: "much-too-long-id", Steps: nil},
		{ID: "ok", Steps: []Step{{State: "toolong", Action: "left", Probability: ptr(0)}, {State: "", Action: "", Reward: math.Inf(1), Probability: ptr(1.5)}}},
		{ID: "ok", Steps: []Step{{State: "s", Action: "left"}, {State: "s", Action: "left"}, {State: "s", Action: "left"}, {State: "s", Action: "left"}}},
		{ID: "bad\x00id", Steps: []Step{{State: "\xff", Action: "left"}}},
		{ID: "big", Steps: []Step{{State: "a\x00", Action: "right", Reward: -2e15}, {State: "b", Action: "right", Reward: 1e15}}},
	}, lim)
	var verr *ValidationError
	if !errors.As(err, &verr) {
		t.Fatalf("error %v is not a ValidationError", err)
	}
	want := []string{
		"episode 0, id: is missing",
		"episode 0, step 0, action: \"up\" is not one of the policy's actions",
		"episode 0, step 0, reward: must be a finite number",
		"episode 1, id: is 16 bytes, longer than the limit of 8",
		"episode 1, steps: must hold at least one step",
		"episode 2, step 0, state: is 7 bytes, longer than the limit of 4",
		"episode 2, step 0, probability: must be in (0, 1], got 0",
		"episode 2, step 1, state: is missing",
		"episode 2, step 1, action: is missing",
		"episode 2, step 1, reward: must be a finite number",
		"episode 2, step 1, probability: must be in (0, 1], got 1.5",
		"episode 3, id: repeats the id of episode 2 in this request",
		"episode 3, steps: holds 4 steps, more than the limit of 3",
		"episode 4, id: must be valid UTF-8 without control characters",
		"episode 4, step 0, state: must be valid UTF-8 without control characters",
		"episode 5, step 0, state: must be valid UTF-8 without control characters",
		"episode 5, step 0, reward: -2e+15 is larger in magnitude than the limit of 1e+15",
	}
	var got []string
	for _, p := range verr.Problems {
		got = append(got, p.String())
	}
	if strings.Join(got, "\n") != strings.Join(want, "\n") {
		t.Fatalf("problems:\n%s\nwant:\n%s", strings.Join(got, "\n"), strings.Join(want, "\n"))
	}
}

func TestValidateAndEncodeEpisodesRefusesEmptyAndOversizedBatches(t *testing.T) {
	s := Settings{Actions: []string{"a", "b"}}
	if _, err := ValidateAndEncodeEpisodes(s, nil, DefaultLimits()); err == nil {
		t.Fatal("empty batch accepted")
	}
	lim := DefaultLimits()
	lim.MaxEpisodes = 1
	eps := []Episode{{ID: "1", Steps: []Step{{State: "s", Action: "a"}}}, {ID: "2", Steps: []Step{{State: "s", Action: "a"}}}}
	if _, err := ValidateAndEncodeEpisodes(s, eps, lim); err == nil || !strings.Contains(err.Error(), "more than the limit of 1") {
		t.Fatalf("oversized batch: %v", err)
	}
}

func TestSettingsValidation(t *testing.T) {
	good := DefaultSettings()
	good.Actions = []string{"a", "b"}
	if err := good.Validate(); err != nil {
		t.Fatalf("defaults with two actions: %v", err)
	}
	bad := Settings{Actions: []string{"a", "a", ""}, Gamma: 1.5, Alpha: 0, Epsilon: 0.1, EpsilonMin: 0.2,
		Visit: "sometimes", InitialQ: math.Inf(1), EpsilonDecayVisits: -1}
	err := bad.Validate()
	var verr *ValidationError
	if !errors.As(err, &verr) {
		t.Fatalf("got %v", err)
	}
	fields := map[string]bool{}
	for _, p := range verr.Problems {
		fields[p.Field] = true
	}
	for _, f := range []string{"actions", "gamma", "alpha", "epsilon_min", "visit", "initial_q", "epsilon_decay_visits"} {
		if !fields[f] {
			t.Errorf("no problem reported for %s; got %v", f, verr.Problems)
		}
	}
	blank := good
	blank.Actions = []string{"a", ""}
	if err := blank.Validate(); err == nil || !strings.Contains(err.Error(), "actions[1]: must not be empty") {
		t.Errorf("blank action name: %v", err)
	}
	one := good
	one.Actions = []string{"only"}
	if one.Validate() == nil {
		t.Error("a single action was accepted")
	}
}

// The rule for policy names, as a regular expression: the check must agree
// with it on every name.
var policyNameRule = regexp.MustCompile(`^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$`)

func FuzzPolicyNameFollowsTheRule(f *testing.F) {
	for _, s := range []string{"checkout", "a", "retry-v2.1_b", "", "../etc", "-x", "a b", "caf\u00e9", "x\n", strings.Repeat("y", 64), strings.Repeat("y", 65), "A.", "9-_"} {
		f.Add(s)
	}
	f.Fuzz(func(t *testing.T, name string) {
		if got, want := ValidatePolicyName(name) == nil, policyNameRule.MatchString(name); got != want {
			t.Fatalf("%q: accepted %v, the rule says %v", name, got, want)
		}
	})
}

func TestPolicyNames(t *testing.T) {
	for _, ok := range []string{"checkout", "a", "retry-v2.1_b"} {
		if err := ValidatePolicyName(ok); err != nil {
			t.Errorf("%q refused: %v", ok, err)
		}
	}
	for _, bad := range []string{"", "../etc", "-x", "a b", strings.Repeat("x", 65), "caf\u00e9"} {
		if ValidatePolicyName(bad) == nil {
			t.Errorf("%q accepted", bad)
		}
	}
}
