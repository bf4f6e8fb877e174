package systemtest

import (
	"encoding/json"
	"fmt"
	"math"
	"math/rand/v2"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/qtally/qtally/storage/pgtest"
)

// maskedStep is a step as a client that logs its action masks posts it.
type maskedStep struct {
	State       string   `json:"state"`
	Action      string   `json:"action"`
	Reward      float64  `json:"reward"`
	Probability float64  `json:"probability"`
	Allowed     []string `json:"allowed,omitempty"`
}

type maskedEpisode struct {
	ID    string       `json:"id"`
	Steps []maskedStep `json:"steps"`
}

// maskResult is the part of an evaluation result these tests read.
type maskResult struct {
	evaluationResult
	StepsWithoutAllowed    int64 `json:"steps_without_allowed"`
	EpisodesWithoutAllowed int64 `json:"episodes_without_allowed"`
}

// The contact scenario of these tests: one state, three channels, and
// "call" never allowed (the customer opted out of calls).
const (
	contactState = "overdue|opted_out_of_calls"
	contactEmail = "email"
	contactSMS   = "sms"
	contactCall  = "call"
)

var contactActions = []string{contactEmail, contactSMS, contactCall}

// trainContactTable creates a policy and trains its table to Q(email) = 1
// and Q(sms) = 0 with visits 5 each (alpha 1 makes each update land on the
// return), "call" never updated, then freezes it as the snapshot "trained".
func trainContactTable(s *service, policy string, settings map[string]any) {
	s.t.Helper()
	settings["actions"], settings["alpha"], settings["gamma"] = contactActions, 1, 1
	s.call("PUT", "/v1/policies/"+policy, settings, 201)
	var seeds []episodeJSON
	for i := range 5 {
		seeds = append(seeds, oneStep(fmt.Sprintf("seed-email-%d", i), contactState, contactEmail, 1),
			oneStep(fmt.Sprintf("seed-sms-%d", i), contactState, contactSMS, 0))
	}
	s.post(policy, seeds...)
	s.waitTrained(policy, int64(len(seeds)))
	s.call("POST", "/v1/policies/"+policy+"/snapshots", map[string]any{"name": "trained"}, 201)
}

// uniformContactEpisodes are one-step episodes of a behaviour that picks
// email or sms with probability 1/2 each; reward 1 for email, 0 for sms.
// With logAllowed each step carries the set it was chosen from.
func uniformContactEpisodes(rng *rand.Rand, prefix string, n int, logAllowed bool) (eps []maskedEpisode, emails int) {
	eps = make([]maskedEpisode, n)
	for i := range eps {
		st := maskedStep{State: contactState, Action: contactSMS, Probability: 0.5}
		if rng.IntN(2) == 0 {
			st.Action, st.Reward = contactEmail, 1
			emails++
		}
		if logAllowed {
			st.Allowed = []string{contactEmail, contactSMS}
		}
		eps[i] = maskedEpisode{ID: fmt.Sprintf("%s-%d", prefix, i), Steps: []maskedStep{st}}
	}
	return eps, emails
}

// postMasked posts episodes as NDJSON, 10,000 (the default limit) a
// request, and returns the first answer other than 202, or the last.
func postMasked(s *service, policy string, eps []maskedEpisode) reply {
	s.t.Helper()
	var r reply
	for len(eps) > 0 {
		n := min(len(eps), 10_000)
		var b strings.Builder
		for _, ep := range eps[:n] {
			b.Write(must(json.Marshal(ep)))
			b.WriteByte('\n')
		}
		if r = s.send("POST", "/v1/policies/"+policy+"/episodes", "application/x-ndjson", []byte(b.String()), false); r.Status != 202 {
			return r
		}
		eps = eps[n:]
	}
	return r
}

// The epsilon-soft policy that choose runs under a mask must be the one
// evaluation evaluates. Actions {email, sms, call}, call always masked,
// Q(email) = 1, Q(sms) = 0, epsilon 0.3 in the state, reward 1 for email
// and 0 otherwise. By the epsilon-soft definition (Sutton & Barto,
// Reinforcement Learning: An Introduction, 2nd ed., section 5.4, applied to
// the allowed set A' = {email, sms}), pi(email) = 1 - 0.3 + 0.3/2 = 0.85 and
// pi(sms) = 0.3/2 = 0.15, so the policy's value is 0.85 * 1 = 0.85.
// Spreading epsilon over all three actions instead gives pi(email) = 0.8,
// pi(sms) = 0.1: ordinary IS then tends to 0.5 * (0.8/0.5) = 0.80 and
// weighted IS to 0.8 / (0.8 + 0.1) = 0.889, which is what evaluation gave
// before steps could carry their allowed set, and what it still gives for
// steps posted without one.
func TestEvaluationUsesTheLoggedActionMasks(t *testing.T) {
	t.Parallel()
	const unlogged, logged = 10_000, 20_000
	s := startService(t, pgtest.NewDatabase(t))
	// epsilon(s) = 0.6 * 10 / (10 + N(s)) and N(s) = 10 after training:
	// 0.3, through the same per-state decay as choose applies.
	trainContactTable(s, "contact", map[string]any{"epsilon": 0.6, "epsilon_decay_visits": 10})

	// The choose answer carries what a step needs: the probability, and the
	// allowed set as used (every action when none was given).
	for range 20 {
		var c struct {
			chosen
			Allowed []string `json:"allowed"`
		}
		s.call("POST", "/v1/policies/contact/choose", map[string]any{"state": contactState, "mode": "explore", "allowed": []string{contactEmail, contactSMS}}, 200).decode(t, &c)
		want := map[string]float64{contactEmail: 0.85, contactSMS: 0.15}[c.Action]
		if math.Abs(c.Probability-want) > 1e-12 || !slices.Equal(c.Allowed, []string{contactEmail, contactSMS}) {
			t.Fatalf("choose under the mask answered %+v, want probability %v and the allowed set echoed", c, want)
		}
	}
	var all struct {
		Allowed []string `json:"allowed"`
	}
	s.call("POST", "/v1/policies/contact/choose", map[string]any{"state": contactState, "mode": "explore"}, 200).decode(t, &all)
	if !slices.Equal(all.Allowed, contactActions) {
		t.Fatalf("choose without a mask echoes allowed %v, want every action %v", all.Allowed, contactActions)
	}

	evaluate := func(last int) maskResult {
		t.Helper()
		job, _ := startJob[maskResult](s, "/v1/policies/contact/evaluations", map[string]any{
			"target": map[string]any{"table": "trained", "mode": "explore"}, "window": map[string]any{"last": last}, "seed": 7}, 2*time.Minute)
		if job.Status != "succeeded" {
			t.Fatalf("evaluation %s: %s", job.Status, job.Error)
		}
		r := *job.Result
		t.Logf("last %d: ordinary %.4f, weighted %.4f, steps without allowed %d, notes %q", last, r.Ordinary.Estimate, r.Weighted.Estimate, r.StepsWithoutAllowed, r.Notes)
		return r
	}
	// Tolerances are 4 standard errors, from the estimators' variances under
	// this behaviour: ordinary, rho G is 2 pi(email) or 0 with probability
	// 1/2 each, so its sd is pi(email); weighted, the delta method on
	// f(p) = pi_e p / (pi_e p + pi_s (1 - p)) at p = 1/2 gives sd
	// |f'(1/2)| / (2 sqrt(n)) with f'(1/2) = 4 pi_e pi_s / (pi_e + pi_s)^2.
	check := func(what string, got, want, sd float64, n int) {
		t.Helper()
		if tol := 4 * sd / math.Sqrt(float64(n)); math.Abs(got-want) > tol {
			t.Errorf("%s: %.4f, want %.4f within %.4f", what, got, want, tol)
		}
	}
	rng := rand.New(rand.NewPCG(11, 2026))

	// Steps posted without their set keep the old meaning (epsilon over
	// every action), are counted, and the result says so.
	eps, _ := uniformContactEpisodes(rng, "unlogged", unlogged, false)
	if r := postMasked(s, "contact", eps); r.Status != 202 {
		t.Fatalf("post without allowed sets: %d %s", r.Status, r.Body)
	}
	r := evaluate(unlogged)
	check("ordinary IS without masks", r.Ordinary.Estimate, 0.80, 0.8, unlogged)
	check("weighted IS without masks", r.Weighted.Estimate, 0.8/0.9, 2*0.8*0.1/(0.9*0.9), unlogged)
	if r.StepsWithoutAllowed != unlogged || r.EpisodesWithoutAllowed != unlogged || !strings.Contains(strings.Join(r.Notes, " "), "allowed") {
		t.Errorf("steps without an allowed set are not counted and noted: %+v", r)
	}

	eps, emails := uniformContactEpisodes(rng, "logged", logged, true)
	if r := postMasked(s, "contact", eps); r.Status != 202 {
		t.Fatalf("post with allowed sets: %d %s", r.Status, r.Body)
	}
	r = evaluate(logged)
	check("ordinary IS with masks", r.Ordinary.Estimate, 0.85, 0.85, logged)
	check("weighted IS with masks", r.Weighted.Estimate, 0.85, 2*0.85*0.15, logged)
	// Exactly: email episodes have rho = 0.85/0.5, sms ones 0.15/0.5.
	wantOrd := 1.7 * float64(emails) / logged
	wantWtd := 1.7 * float64(emails) / (1.7*float64(emails) + 0.3*float64(logged-emails))
	if math.Abs(r.Ordinary.Estimate-wantOrd) > 1e-9 || math.Abs(r.Weighted.Estimate-wantWtd) > 1e-9 {
		t.Errorf("estimates %.6f and %.6f, the logged episodes give exactly %.6f and %.6f", r.Ordinary.Estimate, r.Weighted.Estimate, wantOrd, wantWtd)
	}
	if r.StepsWithoutAllowed != 0 || r.EpisodesWithoutAllowed != 0 || strings.Contains(strings.Join(r.Notes, " "), "allowed") {
		t.Errorf("every step carried its set, yet: %+v", r)
	}
}

// A greedy target is greedy among the allowed actions: when the masked
// action's unseen value (initial_q 10) is the highest, episodes that took
// the best allowed action still carry weight.
func TestGreedyEvaluationIgnoresAMaskedActionsInitialValue(t *testing.T) {
	t.Parallel()
	const n = 200
	s := startService(t, pgtest.NewDatabase(t))
	trainContactTable(s, "optimistic", map[string]any{"initial_q": 10})
	eps, emails := uniformContactEpisodes(rand.New(rand.NewPCG(3, 5)), "masked", n, true)
	if r := postMasked(s, "optimistic", eps); r.Status != 202 {
		t.Fatalf("post: %d %s", r.Status, r.Body)
	}
	job, _ := startJob[maskResult](s, "/v1/policies/optimistic/evaluations", map[string]any{
		"target": map[string]any{"table": "trained"}, "window": map[string]any{"last": n}, "seed": 1}, time.Minute)
	if job.Status != "succeeded" {
		t.Fatalf("evaluation %s: %s", job.Status, job.Error)
	}
	// The greedy action among {email, sms} is email (Q 1 against 0): email
	// episodes have rho = 1/0.5 = 2 and return 1, sms episodes rho 0.
	r := job.Result
	if r.ZeroWeightEpisodes != int64(n-emails) || r.Weighted.Estimate != 1 || math.Abs(r.Ordinary.Estimate-2*float64(emails)/n) > 1e-12 {
		t.Fatalf("greedy evaluation under masks: %d emails of %d, result %+v", emails, n, r)
	}
}

// A step's allowed set must hold its action, name only the policy's
// actions and none twice; otherwise the batch is refused with the episode,
// step and field named, in JSON and NDJSON alike, and nothing is stored.
func TestStepAllowedSetsAreValidated(t *testing.T) {
	t.Parallel()
	db := pgtest.NewDatabase(t)
	s := startService(t, db)
	s.call("PUT", "/v1/policies/contact", map[string]any{"actions": contactActions}, 201)
	good := `{"state":"s","action":"email","reward":1,"probability":0.5,"allowed":["email","sms"]}`
	episode := func(id, second string) string {
		return `{"id":"` + id + `","steps":[` + good + `,` + second + `]}`
	}
	cases := []struct {
		name, step string
		want       []string
	}{
		{"action outside its set", `{"state":"s","action":"call","reward":0,"probability":0.5,"allowed":["email","sms"]}`,
			[]string{`"field":"allowed"`, `\"call\"`, "not in"}},
		{"unknown action in the set", `{"state":"s","action":"sms","reward":0,"probability":0.5,"allowed":["sms","fax"]}`,
			[]string{`"field":"allowed[1]"`, `\"fax\" is not one of the policy's actions`}},
		{"action named twice", `{"state":"s","action":"sms","reward":0,"probability":0.5,"allowed":["sms","email","sms"]}`,
			[]string{`"field":"allowed[2]"`, "repeats"}},
		{"empty set", `{"state":"s","action":"sms","reward":0,"probability":0.5,"allowed":[]}`,
			[]string{`"field":"allowed"`, "at least one action"}},
		{"set of the wrong type", `{"state":"s","action":"sms","reward":0,"probability":0.5,"allowed":"sms"}`,
			[]string{`"field":"allowed"`, "expected an array"}},
	}
	before := pgtest.Dump(t, db, "episodes")
	for _, tc := range cases {
		for _, media := range []string{"application/json", "application/x-ndjson"} {
			body := `{"episodes":[` + episode("ok-1", good) + `,` + episode("bad-1", tc.step) + `]}`
			if media == "application/x-ndjson" {
				body = episode("ok-1", good) + "\n" + episode("bad-1", tc.step) + "\n"
			}
			r := s.send("POST", "/v1/policies/contact/episodes", media, []byte(body), true)
			want := append([]string{`"episode":1`, `"step":1`}, tc.want...)
			for _, w := range want {
				if r.Status != 400 || !strings.Contains(string(r.Body), w) {
					t.Errorf("%s (%s): %d %s, want 400 with %s", tc.name, media, r.Status, r.Body, w)
					break
				}
			}
		}
	}
	if after := pgtest.Dump(t, db, "episodes"); after != before {
		t.Errorf("refused batches changed the stored episodes:\n%s", after)
	}
	// The same batch with a valid second step is stored whole.
	s.send("POST", "/v1/policies/contact/episodes", "application/json", []byte(`{"episodes":[`+episode("ok-1", good)+`]}`), false)
	if st := s.status("contact"); st.Episodes != 1 {
		t.Errorf("a valid batch stored %d episodes, want 1", st.Episodes)
	}
}
