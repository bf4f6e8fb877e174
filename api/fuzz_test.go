package api

import (
	"encoding/json"
	"errors"
	"math"
	"net/url"
	"reflect"
	"slices"
	"strings"
	"testing"
	"unicode"
	"unicode/utf8"

	"github.com/qtally/qtally/training"
)

// maxProblemMessage bounds what an answer echoes of a hostile request.
const maxProblemMessage = 512

// checkRefusal holds when err is a client error that locates its problems
// sensibly and does not echo unbounded input.
func checkRefusal(t *testing.T, err error) {
	t.Helper()
	var verr *training.ValidationError
	if !errors.As(err, &verr) {
		t.Fatalf("refusal %v (%T) is not a ValidationError, so it would be answered 500", err, err)
	}
	if len(verr.Problems) == 0 {
		t.Fatal("refusal without a problem")
	}
	for _, p := range verr.Problems {
		if p.Message == "" || len(p.Message) > maxProblemMessage || !utf8.ValidString(p.Message) {
			t.Fatalf("problem message %.600q: want 1 to %d bytes of UTF-8", p.Message, maxProblemMessage)
		}
		if p.Episode < -1 || p.Step < -1 || (p.Step >= 0 && p.Episode < 0) || len(p.Field) > 64 {
			t.Fatalf("problem located at episode %d, step %d, field %q", p.Episode, p.Step, p.Field)
		}
	}
}

func printable(s string) bool {
	return utf8.ValidString(s) && !strings.ContainsFunc(s, unicode.IsControl)
}

// Whatever the body, decoding and validating an episode batch either
// refuses it with located client errors or yields records that obey every
// rule the store and the learner rely on.
func FuzzDecodeEpisodes(f *testing.F) {
	settings := training.Settings{Actions: []string{"truck", "drone", "wait"}, Gamma: 0.9, Alpha: 0.1, Visit: training.FirstVisit}
	lim := training.Limits{MaxEpisodes: 20, MaxSteps: 20, MaxIDLength: 16, MaxStateLength: 24}
	for _, seed := range []struct {
		body   string
		ndjson bool
	}{
		{`{"episodes":[{"id":"a","steps":[{"state":"rain","action":"truck","reward":1,"probability":0.5}]}]}`, false},
		{`{"id":"a","steps":[{"state":"rain","action":"drone","reward":-2.5}]}` + "\n" + `{"id":"b","steps":[{"state":"dry","action":"wait","reward":0}]}`, true},
		{`{"episodes":[{"id":"a","steps":[{"state":"s","action":"truck","reward":NaN}]}]}`, false},
		{`{"episodes":[{"id":"a","steps":[{"state":"s","action":"truck","reward":"Infinity"}]}]}`, false},
		{`{"episodes":[{"id":"a","steps":[{"state":"s","action":"truck","reward":1e999}]}]}`, false},
		{`{"episodes":[{"id":"a","steps":[{"state":"caf` + "\xe9" + `","action":"truck","reward":1}]}]}`, false},
		{`{"episodes":[{"id":"x","steps":[{"state":"s","action":"truck","reward":1}]},{"id":"x","steps":[{"state":"s","action":"truck","reward":1}]}]}`, false},
		{`{"episodes":[{"id":"a","steps":[{"state":"s\u0000","action":"truck","reward":1,"extra":true}]}]}`, false},
		{`{"episodes":` + strings.Repeat("[", 60) + strings.Repeat("]", 60) + `}`, false},
		{`{"episodes":[{"id":"a","steps":[{"state":"s","action":"truck","reward":1}]}]}{}`, false},
		{"", true},
		{`{"id":"a","steps":[{"state":"s","action":"truck","reward":-Infinity}]}`, true},
		{`{"episodes":[{"id":"a","steps":[{"state":"s","action":"wait","reward":1,"probability":0.5,"allowed":["wait","truck"]},{"state":"s","action":"drone","reward":0}]}]}`, false},
		{`{"id":"a","steps":[{"state":"s","action":"wait","reward":1,"allowed":["truck","truck"]}]}`, true},
		{`{"id":"a","steps":[{"state":"s","action":"wait","reward":1,"allowed":[]}]}`, true},
	} {
		f.Add([]byte(seed.body), seed.ndjson)
	}
	f.Fuzz(func(t *testing.T, body []byte, ndjson bool) {
		media := mediaJSON
		if ndjson {
			media = mediaNDJSON
		}
		episodes, err := decodeEpisodes(body, media)
		if err != nil {
			checkRefusal(t, err)
			return
		}
		records, err := training.ValidateAndEncodeEpisodes(settings, episodes, lim)
		if err != nil {
			checkRefusal(t, err)
			return
		}
		if len(records) != len(episodes) || len(records) == 0 || len(records) > lim.MaxEpisodes {
			t.Fatalf("%d records from %d episodes", len(records), len(episodes))
		}
		ids := map[string]bool{}
		for i, r := range records {
			ep := episodes[i]
			if r.ID != ep.ID || r.ID == "" || len(r.ID) > lim.MaxIDLength || !printable(r.ID) || ids[r.ID] {
				t.Fatalf("record %d has id %q", i, r.ID)
			}
			ids[r.ID] = true
			n := len(ep.Steps)
			if n == 0 || n > lim.MaxSteps || len(r.States) != n || len(r.Actions) != n || len(r.Rewards) != n ||
				(r.Probabilities != nil && len(r.Probabilities) != n) ||
				(r.Allowed != nil && len(r.Allowed) != n*training.ActionSetWidth(len(settings.Actions))) {
				t.Fatalf("record %d has columns of %d/%d/%d/%d for %d steps", i, len(r.States), len(r.Actions), len(r.Rewards), len(r.Probabilities), n)
			}
			for j, st := range ep.Steps {
				if r.States[j] != st.State || st.State == "" || len(st.State) > lim.MaxStateLength || !printable(st.State) {
					t.Fatalf("record %d step %d has state %q", i, j, r.States[j])
				}
				if a := r.Actions[j]; a < 0 || int(a) >= len(settings.Actions) || settings.Actions[a] != st.Action {
					t.Fatalf("record %d step %d has action %d for %q", i, j, a, st.Action)
				}
				if x := r.Rewards[j]; math.IsNaN(x) || math.IsInf(x, 0) || math.Abs(x) > training.MaxAbsReward || x != st.Reward {
					t.Fatalf("record %d step %d has reward %v", i, j, x)
				}
				if st.Probability != nil && (r.Probabilities[j] != *st.Probability || !(*st.Probability > 0 && *st.Probability <= 1)) {
					t.Fatalf("record %d step %d has probability %v", i, j, r.Probabilities[j])
				}
				if st.Probability == nil && r.Probabilities != nil && r.Probabilities[j] != 0 {
					t.Fatalf("record %d step %d has a probability the client did not send", i, j)
				}
				set := r.AllowedAt(j)
				if (st.Allowed == nil) != (set == nil) || (set != nil && !set.Has(r.Actions[j])) {
					t.Fatalf("record %d step %d has allowed set %v for %q", i, j, set, st.Allowed)
				}
				for a, name := range settings.Actions {
					if set != nil && set.Has(int16(a)) != slices.Contains(st.Allowed, name) {
						t.Fatalf("record %d step %d has allowed set %v for %q", i, j, set, st.Allowed)
					}
				}
			}
		}
		// What was accepted survives a round trip unchanged: nothing was
		// silently replaced on the way in.
		again, err := json.Marshal(episodesBody{Episodes: episodes})
		if err != nil {
			t.Fatalf("accepted episodes do not encode: %v", err)
		}
		back, err := decodeEpisodes(again, mediaJSON)
		if err != nil || !reflect.DeepEqual(back, episodes) {
			t.Fatalf("accepted episodes change in a round trip: %v", err)
		}
	})
}

// Whatever the body and name, a policy is either refused with located
// client errors or has settings within every documented bound, and a name
// that is safe as one URL path segment.
func FuzzPolicySettings(f *testing.F) {
	for _, seed := range []struct{ body, name string }{
		{`{"actions":["truck","drone"]}`, "parcel-routing"},
		{`{"actions":["a","b","c"],"gamma":0.9,"alpha":0.5,"epsilon":0.2,"epsilon_min":0.05,"epsilon_decay_visits":100,"visit":"every","initial_q":10}`, "v2.checkout_EU"},
		{`{"actions":["a","a"]}`, "..%2Fetc"},
		{`{"actions":["a","b"],"alpha":"NaN"}`, "a/b"},
		{`{"actions":["a","b"],"initial_q":1e999}`, ".."},
		{`{"actions":["a","b"],"epsilon":0.1,"epsilon_min":0.3}`, "ok"},
		{`{"actions":["a","b\u0007"],"learning_rate":1}`, strings.Repeat("p", 65)},
		{`{"actions":["a","` + "\xff" + `"]}`, "p\x00"},
		{`{"actions":{"a":1}}`, ""},
		{`{"actions":["a","b"],"visit":"sometimes","gamma":-0}`, "Ω"},
	} {
		f.Add([]byte(seed.body), seed.name)
	}
	f.Fuzz(func(t *testing.T, body []byte, name string) {
		if training.ValidatePolicyName(name) == nil {
			if url.PathEscape(name) != name || name == "." || name == ".." || len(name) > training.MaxPolicyNameLen {
				t.Fatalf("policy name %q accepted but unsafe in a path", name)
			}
		}
		s := training.DefaultSettings()
		err := decodeStrict(body, &s, -1)
		if err == nil {
			err = s.Validate()
		}
		if err != nil {
			checkRefusal(t, err)
			return
		}
		finite := func(x float64) bool { return !math.IsNaN(x) && !math.IsInf(x, 0) }
		switch {
		case len(s.Actions) < training.MinActions || len(s.Actions) > training.MaxActions:
			t.Fatalf("%d actions accepted", len(s.Actions))
		case !(s.Gamma >= 0 && s.Gamma <= 1), !(s.Alpha > 0 && s.Alpha <= 1), !(s.Epsilon >= 0 && s.Epsilon <= 1):
			t.Fatalf("gamma %v, alpha %v, epsilon %v accepted", s.Gamma, s.Alpha, s.Epsilon)
		case !(s.EpsilonMin >= 0 && s.EpsilonMin <= s.Epsilon), !(s.EpsilonDecayVisits >= 0 && finite(s.EpsilonDecayVisits)):
			t.Fatalf("epsilon_min %v, epsilon_decay_visits %v accepted", s.EpsilonMin, s.EpsilonDecayVisits)
		case !finite(s.InitialQ) || math.Abs(s.InitialQ) > training.MaxAbsReward:
			t.Fatalf("initial_q %v accepted", s.InitialQ)
		case s.Visit != training.FirstVisit && s.Visit != training.EveryVisit:
			t.Fatalf("visit %q accepted", s.Visit)
		}
		for i, a := range s.Actions {
			if a == "" || len(a) > training.MaxActionNameLen || !printable(a) || slices.Index(s.Actions, a) != i {
				t.Fatalf("action %d %q accepted", i, a)
			}
		}
		for _, n := range []int64{0, 1, 1000, math.MaxInt64} {
			if e := s.EpsilonFor(n); !(e >= 0 && e <= 1) {
				t.Fatalf("epsilon after %d visits is %v", n, e)
			}
		}
		// Accepted settings read back the same.
		again := training.DefaultSettings()
		if err := decodeStrict(must(json.Marshal(s)), &again, -1); err != nil || !reflect.DeepEqual(again, s) {
			t.Fatalf("settings change in a round trip: %v", err)
		}
	})
}

func must[T any](v T, err error) T {
	if err != nil {
		panic(err)
	}
	return v
}
