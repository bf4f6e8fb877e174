package systemtest

import (
	"net/url"
	"strings"
	"testing"

	"github.com/qtally/qtally/storage/pgtest"
)

type chooseAnswer struct {
	Action       string  `json:"action"`
	Probability  float64 `json:"probability"`
	Explored     bool    `json:"explored"`
	GreedyAction string  `json:"greedy_action"`
	KnownState   bool    `json:"known_state"`
	Visits       int64   `json:"visits"`
	Fallback     bool    `json:"fallback"`
	Revision     int64   `json:"revision"`
}

// Greedy answers only with actions tried in the state (enough times, when
// the policy says how many), falls back to the policy's fallback action
// where nothing is known enough, or says it has no answer. The
// counter-examples: in an unseen state greedy answered any action, and in a
// known state an untried action's initial value beat the learned negative
// values of the tried ones.
func TestGreedyAnswersOnlyWithTriedActions(t *testing.T) {
	t.Parallel()
	s := startService(t, pgtest.NewDatabase(t))
	const base = "/v1/policies/renewals"
	s.call("PUT", base, map[string]any{"actions": []string{"text_reminder", "wait", "write_off"}, "alpha": 1, "gamma": 1}, 201)
	// alpha 1: each Q is the last return seen. Both tried actions are worth
	// less than the untried write_off's initial value 0.
	s.call("POST", base+"/episodes", map[string]any{"episodes": []episodeJSON{
		{ID: "1", Steps: []stepJSON{{State: "day=3", Action: "text_reminder", Reward: -2}}},
		{ID: "2", Steps: []stepJSON{{State: "day=3", Action: "wait", Reward: -5}}},
	}}, 202)
	s.waitTrained("renewals", 2)
	revision := s.status("renewals").Revision
	choose := func(state, mode string, allowed ...string) chooseAnswer {
		t.Helper()
		req := map[string]any{"state": state, "mode": mode}
		if allowed != nil {
			req["allowed"] = allowed
		}
		var c chooseAnswer
		waitFor(t, patience, "choose to hold the latest revision", func() bool {
			s.call("POST", base+"/choose", req, 200).decode(t, &c)
			return c.Revision >= revision
		})
		return c
	}
	for range 20 {
		if c := choose("day=3", "greedy"); c.Action != "text_reminder" || c.Visits != 1 || c.Fallback || c.Probability != 1 {
			t.Fatalf("greedy in a known state: %+v, want text_reminder (tried once), never the untried write_off", c)
		}
	}
	// Exploring still tries write_off, with epsilon/|A|; the greedy part is
	// the tried text_reminder (default epsilon 0.1).
	for range 20 {
		c := choose("day=3", "explore")
		if c.GreedyAction != "text_reminder" || (c.Action == "write_off" && (c.Probability != 0.1/3 || c.Visits != 0)) {
			t.Fatalf("explore in a known state: %+v", c)
		}
	}

	// An unseen state has no tried action: no answer, with a problem that
	// says why and what to do.
	nothing := func(state string, allowed ...string) string {
		t.Helper()
		req := map[string]any{"state": state, "mode": "greedy"}
		if allowed != nil {
			req["allowed"] = allowed
		}
		r := s.call("POST", base+"/choose", req, 409)
		if !strings.Contains(string(r.Body), "#no-greedy-answer") || !strings.Contains(string(r.Body), "greedy_fallback") {
			t.Fatalf("no answer without a reason: %s", r.Body)
		}
		return string(r.Body)
	}
	nothing("day=9")
	nothing("day=3", "write_off")

	// With a fallback action, greedy answers it where nothing is tried enough.
	s.patch(base, `{"greedy_fallback":"wait","greedy_min_visits":2}`, 200)
	waitFor(t, patience, "the fallback to reach choose", func() bool {
		var c chooseAnswer
		r := s.send("POST", base+"/choose", "application/json", []byte(`{"state":"day=9","mode":"greedy"}`), false)
		if r.Status != 200 {
			return false
		}
		r.decode(t, &c)
		return c.Action == "wait" && c.Fallback
	})
	// text_reminder was tried once, fewer than 2: the fallback serves.
	if c := choose("day=3", "greedy"); c.Action != "wait" || !c.Fallback || c.Visits != 1 {
		t.Fatalf("under-visited known state: %+v, want the fallback wait", c)
	}
	if page := string(s.send("GET", "/policies/renewals", "", nil, false).Body); !strings.Contains(page, "greedy needs 2 visits, else wait") {
		t.Errorf("the policy page does not state the greedy rule")
	}
	// A fallback masked out leaves no answer.
	nothing("day=9", "text_reminder", "write_off")
	s.call("POST", base+"/episodes", map[string]any{"episodes": []episodeJSON{
		{ID: "3", Steps: []stepJSON{{State: "day=3", Action: "text_reminder", Reward: -2}}},
	}}, 202)
	s.waitTrained("renewals", 3)
	revision = s.status("renewals").Revision
	if c := choose("day=3", "greedy"); c.Action != "text_reminder" || c.Fallback || c.Visits != 2 {
		t.Fatalf("once tried twice: %+v, want text_reminder", c)
	}

	// The policy may let untried actions compete with their initial value.
	s.patch(base, `{"greedy_untried":true,"greedy_min_visits":0,"greedy_fallback":null}`, 200)
	waitFor(t, patience, "greedy_untried to reach choose", func() bool {
		var c chooseAnswer
		s.call("POST", base+"/choose", map[string]any{"state": "day=3", "mode": "greedy"}, 200).decode(t, &c)
		return c.Action == "write_off" && c.Visits == 0
	})
	if c := choose("day=9", "greedy"); c.Probability != 1.0/3 || c.Fallback {
		t.Fatalf("unseen state with untried actions allowed: %+v, want a 3-way tie", c)
	}

	// A fallback must be one of the actions.
	r := s.patch(base, `{"greedy_fallback":"call_customer"}`, 400)
	if !strings.Contains(string(r.Body), `"field":"greedy_fallback"`) {
		t.Fatalf("bad fallback: %s", r.Body)
	}

	// The state view and the status pages show untried actions as untried.
	var view struct {
		GreedyAction string `json:"greedy_action"`
		Actions      []struct {
			Action string `json:"action"`
			Visits int64  `json:"visits"`
		} `json:"actions"`
	}
	s.patch(base, `{"greedy_untried":false}`, 200)
	s.call("GET", base+"/states/"+url.PathEscape("day=3"), nil, 200).decode(t, &view)
	if view.GreedyAction != "text_reminder" {
		t.Fatalf("state view names %q greedy, want the tried text_reminder", view.GreedyAction)
	}
	page := string(s.send("GET", "/policies/renewals/states", "", nil, false).Body)
	if !strings.Contains(page, "write_off <em>untried</em>") {
		t.Fatalf("the states page does not show write_off as untried:\n%s", page)
	}
}
