package systemtest

import (
	"context"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/qtally/qtally/storage"
)

// policyID reads a policy's id, for holding its locks from the test.
func policyID(t *testing.T, conn *pgx.Conn, name string) int32 {
	t.Helper()
	var id int32
	if err := conn.QueryRow(context.Background(), `SELECT policy_id FROM policies WHERE name = $1`, name).Scan(&id); err != nil {
		t.Fatal(err)
	}
	return id
}

// trainingLockClass is the advisory lock class a policy's training holds.
const trainingLockClass = storage.TrainingLockClass

type storedEpisode struct {
	id            string
	states        []string
	actions       []int16
	rewards       []float64
	probabilities []float64
	allowed       []byte
}

// connectDB opens a connection of the test's own to databaseURL, closed
// when the test ends.
func connectDB(t testing.TB, databaseURL string) *pgx.Conn {
	t.Helper()
	conn, err := pgx.Connect(context.Background(), databaseURL)
	if err != nil {
		t.Fatalf("connect: %v", err)
	}
	t.Cleanup(func() { _ = conn.Close(context.Background()) })
	return conn
}

// storedEpisodes reads a policy's stored episodes in arrival (seq) order.
func storedEpisodes(t testing.TB, databaseURL, policy string) []storedEpisode {
	t.Helper()
	ctx := context.Background()
	rows, err := connectDB(t, databaseURL).Query(ctx, `SELECT e.episode_id, e.states, e.actions, e.rewards, e.probabilities, e.allowed
		FROM episodes e JOIN policies p ON p.policy_id = e.policy_id WHERE p.name = $1 ORDER BY e.seq`, policy)
	if err != nil {
		t.Fatal(err)
	}
	out, err := pgx.CollectRows(rows, func(r pgx.CollectableRow) (storedEpisode, error) {
		var e storedEpisode
		scanErr := r.Scan(&e.id, &e.states, &e.actions, &e.rewards, &e.probabilities, &e.allowed)
		return e, scanErr
	})
	if err != nil {
		t.Fatal(err)
	}
	return out
}

// storedOrder reads a policy's stored episode ids in the order the
// database assigned them (seq), which is the order training must follow,
// and the ids not trained yet. Test-only SQL: the API has no such listing.
func storedOrder(t testing.TB, databaseURL, policy string) (ids, untrained []string) {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	rows, err := connectDB(t, databaseURL).Query(ctx, `
		SELECT e.episode_id, e.seq > p.trained_through FROM episodes e JOIN policies p USING (policy_id)
		WHERE p.name = $1
		ORDER BY e.seq`, policy)
	if err != nil {
		t.Fatalf("read stored episodes: %v", err)
	}
	var id string
	var pending bool
	_, err = pgx.ForEachRow(rows, []any{&id, &pending}, func() error {
		ids = append(ids, id)
		if pending {
			untrained = append(untrained, id)
		}
		return nil
	})
	if err != nil {
		t.Fatalf("read stored episodes: %v", err)
	}
	return ids, untrained
}

// lockWaits counts the sessions of the database waiting for a lock.
func lockWaits(t testing.TB, conn *pgx.Conn) int {
	t.Helper()
	var n int
	if err := conn.QueryRow(context.Background(), `SELECT count(*) FROM pg_stat_activity
		WHERE datname = current_database() AND wait_event_type = 'Lock'`).Scan(&n); err != nil {
		t.Fatalf("count lock waits: %v", err)
	}
	return n
}
