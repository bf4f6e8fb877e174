package systemtest

import (
	"strings"
	"testing"

	"github.com/qtally/qtally/storage/pgtest"
)

// Reposting an episode id with the same content is a counted duplicate;
// with other content it is refused with 409 naming the difference, and
// nothing of the batch is stored. The counter-example: a repost with a late
// reward was answered as a duplicate and the outcome silently lost.
func TestRepostingAnEpisodeWithOtherContentIsAConflict(t *testing.T) {
	t.Parallel()
	s := startService(t, pgtest.NewDatabase(t))
	const base = "/v1/policies/renewals"
	s.call("PUT", base, map[string]any{"actions": []string{"retry_card", "wait"}}, 201)
	half := 0.5
	original := episodeJSON{ID: "renewal-4711", Steps: []stepJSON{
		{State: "day=1", Action: "wait", Reward: 0, Probability: &half},
		{State: "day=2", Action: "retry_card", Reward: 0, Probability: &half},
	}}
	post := func(status int, eps ...episodeJSON) reply {
		t.Helper()
		return s.call("POST", base+"/episodes", map[string]any{"episodes": eps}, status)
	}
	post(202, original)
	var res struct {
		Accepted   int `json:"accepted"`
		Duplicates int `json:"duplicates"`
	}
	post(202, original).decode(t, &res)
	if res.Accepted != 0 || res.Duplicates != 1 {
		t.Fatalf("the same content again: %+v, want one duplicate", res)
	}

	changed := func(edit func(*episodeJSON)) episodeJSON {
		e := episodeJSON{ID: original.ID, Steps: append([]stepJSON(nil), original.Steps...)}
		edit(&e)
		return e
	}
	fresh := episodeJSON{ID: "renewal-4712", Steps: []stepJSON{{State: "day=1", Action: "wait", Reward: 1}}}
	for _, tc := range []struct {
		name string
		ep   episodeJSON
		want []string
	}{
		{"late reward", changed(func(e *episodeJSON) { e.Steps[1].Reward = 30 }), []string{"step 1", "reward", "stored 0", "posted 30"}},
		{"another action", changed(func(e *episodeJSON) { e.Steps[0].Action = "retry_card" }), []string{"step 0", "action", `stored \"wait\"`, `posted \"retry_card\"`}},
		{"another state", changed(func(e *episodeJSON) { e.Steps[0].State = "day=0" }), []string{"step 0", "state"}},
		{"a step more", changed(func(e *episodeJSON) { e.Steps = append(e.Steps, stepJSON{State: "day=3", Action: "wait", Reward: 30}) }), []string{"2 steps", "3 steps"}},
		{"probability left out", changed(func(e *episodeJSON) { e.Steps[0].Probability = nil }), []string{"step 0", "probability"}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			r := post(409, fresh, tc.ep)
			body := string(r.Body)
			for _, want := range append(tc.want, "episode 1", "renewal-4711", "#conflict") {
				if !strings.Contains(body, want) {
					t.Errorf("409 lacks %q: %s", want, body)
				}
			}
		})
	}
	// The refused batches stored nothing, not even their new episode.
	if st := s.status("renewals"); st.Episodes != 1 {
		t.Fatalf("%d episodes stored, want 1", st.Episodes)
	}
	// A new id carries the late outcome.
	post(202, changed(func(e *episodeJSON) { e.ID = "renewal-4711-settled"; e.Steps[1].Reward = 30 }))
}
