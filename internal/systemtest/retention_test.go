package systemtest

import (
	"context"
	"fmt"
	"strings"
	"testing"

	"github.com/jackc/pgx/v5"

	"github.com/qtally/qtally/storage/pgtest"
)

// Trained episodes older than the retention are deleted in small batches
// by the worker; untrained ones are kept however old, and learned values
// stay.
func TestTrainedEpisodesArePrunedAfterTheRetention(t *testing.T) {
	t.Parallel()
	db := pgtest.NewDatabase(t)
	s := startService(t, db, "serve", "--episode-retention", "1s", "--prune-interval", "100ms", "--prune-batch", "3")
	s.call("PUT", "/v1/policies/alerts", map[string]any{"actions": []string{"page", "ignore"}}, 201)
	s.call("PUT", "/v1/policies/held", map[string]any{"actions": []string{"page", "ignore"}}, 201)

	// Keep the worker off "held" so its episodes stay untrained.
	conn, err := pgx.Connect(context.Background(), db)
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close(context.Background())
	held := policyID(t, conn, "held")
	if _, err := conn.Exec(context.Background(), `SELECT pg_advisory_lock($1, $2)`, trainingLockClass, held); err != nil {
		t.Fatal(err)
	}
	for i := range 10 {
		s.post("alerts", oneStep(fmt.Sprint(i), "disk full", "page", 1))
	}
	for i := range 4 {
		s.post("held", oneStep(fmt.Sprint(i), "disk full", "page", 1))
	}
	if st := s.waitTrained("alerts", 10); st.Pairs != 1 {
		t.Fatalf("alerts: %+v", st)
	}
	waitFor(t, patience, "trained episodes to be pruned", func() bool { return s.status("alerts").Episodes == 0 })
	if st := s.status("alerts"); st.Pairs != 1 {
		t.Fatalf("pruning lost learned values: %+v", st)
	}
	// A pass counts what it deleted once it has been through every policy,
	// a moment after the deletes commit.
	var metrics string
	waitFor(t, patience, "the metrics to count the 10 pruned episodes", func() bool {
		metrics = string(s.send("GET", "/metrics", "", nil, false).Body)
		return strings.Contains(metrics, `qtally_episodes_pruned_total{policy="alerts"} 10`)
	})
	// The held episodes age past the retention (moved back in SQL: pruning
	// compares with the database's now()). Passes run one after another,
	// so when an alerts episode posted after the pass that counted the one
	// before it is pruned and counted too, a whole pass, held included, ran
	// after the aging.
	pgtest.Exec(t, db, `UPDATE episodes SET received_at = received_at - interval '1 hour' WHERE policy_id = $1`, held)
	alerts := policyID(t, conn, "alerts")
	for n := 11; n <= 12; n++ {
		s.post("alerts", oneStep(fmt.Sprint("after-aging-", n), "disk full", "page", 1))
		s.waitTrained("alerts", 1)
		pgtest.Exec(t, db, `UPDATE episodes SET received_at = received_at - interval '1 hour' WHERE policy_id = $1`, alerts)
		waitFor(t, patience, "a pruning pass after the held episodes aged", func() bool {
			metrics = string(s.send("GET", "/metrics", "", nil, false).Body)
			return strings.Contains(metrics, fmt.Sprintf(`qtally_episodes_pruned_total{policy="alerts"} %d`, n))
		})
	}
	if st := s.status("held"); st.Episodes != 4 || st.Backlog != 4 {
		t.Fatalf("untrained episodes were pruned: %+v", st)
	}

	if _, err := conn.Exec(context.Background(), `SELECT pg_advisory_unlock($1, $2)`, trainingLockClass, held); err != nil {
		t.Fatal(err)
	}
	waitFor(t, patience, "held episodes to be trained, then pruned", func() bool {
		st := s.status("held")
		return st.Episodes == 0 && st.Pairs == 1
	})
}
