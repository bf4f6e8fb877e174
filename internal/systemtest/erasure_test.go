package systemtest

import (
	"net/url"
	"strings"
	"testing"
	"time"

	"github.com/qtally/qtally/storage/pgtest"
)

// An episode's stored record can be erased by id, and a replay then builds
// a table without it; a policy can be deleted with everything it owns.
func TestErasingAnEpisodeAndDeletingAPolicy(t *testing.T) {
	t.Parallel()
	db := pgtest.NewDatabase(t)
	s := startService(t, db)
	const base = "/v1/policies/renewals"
	s.call("PUT", base, map[string]any{"actions": []string{"retry_card", "wait"}, "alpha": 1, "greedy_untried": true}, 201)
	half := 0.5
	s.call("POST", base+"/episodes", map[string]any{"episodes": []episodeJSON{
		{ID: "customer-1-dec", Steps: []stepJSON{{State: "day=1", Action: "wait", Reward: 5, Probability: &half}}},
		{ID: "customer-2-dec", Steps: []stepJSON{{State: "day=2", Action: "retry_card", Reward: 3, Probability: &half}}},
	}}, 202)
	s.waitTrained("renewals", 2)
	s.call("POST", base+"/snapshots", map[string]any{"name": "before-erasure"}, 201)

	s.call("DELETE", base+"/episodes/customer-1-dec", nil, 204)
	r := s.call("DELETE", base+"/episodes/customer-1-dec", nil, 404)
	if !strings.Contains(string(r.Body), "customer-1-dec") {
		t.Fatalf("404 does not name the episode: %s", r.Body)
	}
	if dump := pgtest.Dump(t, db, "episodes"); strings.Contains(dump, "customer-1-dec") || !strings.Contains(dump, "customer-2-dec") {
		t.Fatalf("episodes after erasure:\n%s", dump)
	}
	if st := s.status("renewals"); st.Episodes != 1 {
		t.Fatalf("%d episodes after erasure, want 1", st.Episodes)
	}
	// The learned values keep what the episode taught...
	var v stateView
	s.call("GET", base+"/states/"+url.PathEscape("day=1"), nil, 200).decode(t, &v)
	if !v.Known {
		t.Fatalf("erasure changed the learned values: %+v", v)
	}
	// ...and a replay builds a table without it.
	job, _ := startJob[replayResult](s, base+"/replays", map[string]any{"target": "renewals-rebuilt"}, 30*time.Second)
	if job.Status != "succeeded" || job.Result.EpisodesReplayed != 1 {
		t.Fatalf("replay: %s %s %+v", job.Status, job.Error, job.Result)
	}
	s.call("GET", "/v1/policies/renewals-rebuilt/states/"+url.PathEscape("day=1"), nil, 200).decode(t, &v)
	if v.Known {
		t.Fatalf("the rebuilt table still knows the erased episode's state: %+v", v)
	}
	// The replay's policy has the source's settings, and its history says
	// where it came from.
	var h settingsHistory
	s.call("GET", "/v1/policies/renewals-rebuilt/settings-history", nil, 200).decode(t, &h)
	if len(h.Changes) != 1 || h.Changes[0].Kind != "create" || h.Changes[0].TokenLabel != "replay of renewals" || h.Changes[0].TokenID != nil {
		t.Fatalf("replayed policy's history: %+v", h)
	}
	var rebuilt struct {
		GreedyUntried bool `json:"greedy_untried"`
	}
	s.call("GET", "/v1/policies/renewals-rebuilt", nil, 200).decode(t, &rebuilt)
	if !rebuilt.GreedyUntried {
		t.Fatal("the replay did not keep the source's greedy settings")
	}

	// Deleting a policy removes every row it owns, in every table.
	tables := []string{"policies", "episodes", "q_values", "q_changes", "training_history", "snapshots", "snapshot_values", "jobs", "settings_changes"}
	rows := func(table string) int {
		return strings.Count(pgtest.Dump(t, db, table), "\n") - 1
	}
	for _, table := range tables {
		if rows(table) == 0 {
			t.Fatalf("%s is empty before the deletion: the test would prove nothing", table)
		}
	}
	s.call("POST", base+"/choose", map[string]any{"state": "day=2", "mode": "greedy"}, 200)
	s.call("DELETE", "/v1/policies/renewals-rebuilt", nil, 204)
	s.call("DELETE", base, nil, 204)
	s.call("DELETE", base, nil, 404)
	for _, table := range tables {
		if n := rows(table); n != 0 {
			t.Errorf("%s keeps %d rows of deleted policies:\n%s", table, n, pgtest.Dump(t, db, table))
		}
	}
	s.call("GET", base, nil, 404)
	waitFor(t, patience, "choose to forget the deleted policy", func() bool {
		return s.send("POST", base+"/choose", "application/json", []byte(`{"state":"day=2","mode":"greedy"}`), false).Status == 404
	})
	// The name can be used again, for a policy that starts empty.
	s.call("PUT", base, map[string]any{"actions": []string{"retry_card", "wait"}}, 201)
	if st := s.status("renewals"); st.Episodes != 0 || st.Pairs != 0 {
		t.Fatalf("a new policy of the old name: %+v", st)
	}
}
