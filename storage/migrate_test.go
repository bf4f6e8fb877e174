package storage_test

import (
	"context"
	"database/sql"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/stdlib"
	"github.com/pressly/goose/v3"

	"github.com/qtally/qtally/migrations"
	"github.com/qtally/qtally/storage/pgtest"
)

// Migration 7 gives every existing table a training position: a policy's
// is its last trained episode (a replay's policy: the end of its replay's
// window), an existing snapshot's the last episode trained by the time it
// was taken, or its policy's when no such episode is stored.
func TestTrainingPositionsOfExistingTables(t *testing.T) {
	ctx := context.Background()
	url := pgtest.NewDatabase(t)
	provider, _ := embeddedMigrations(t, url)
	if _, err := provider.DownTo(ctx, 6); err != nil {
		t.Fatalf("roll back to before migration 7: %v", err)
	}
	conn, err := pgx.Connect(ctx, url)
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close(ctx)
	var source, replay int32
	if err := conn.QueryRow(ctx, `INSERT INTO policies (name, actions, gamma, alpha, epsilon, epsilon_min, visit, initial_q)
		VALUES ('source', '{a,b}', 1, 0.1, 0.1, 0, 'first', 0) RETURNING policy_id`).Scan(&source); err != nil {
		t.Fatal(err)
	}
	if err := conn.QueryRow(ctx, `INSERT INTO policies (name, actions, gamma, alpha, epsilon, epsilon_min, visit, initial_q)
		VALUES ('source-replayed', '{a,b}', 1, 0.5, 0.1, 0, 'first', 0) RETURNING policy_id`).Scan(&replay); err != nil {
		t.Fatal(err)
	}
	for _, stmt := range []struct {
		sql  string
		args []any
	}{
		{`INSERT INTO episodes (policy_id, seq, episode_id, states, actions, rewards, trained_at) VALUES
			($1, 10, 'e10', '{s}', '{0}', '{1}', '2026-01-01T10:00:00Z'),
			($1, 11, 'e11', '{s}', '{1}', '{1}', '2026-01-01T12:00:00Z'),
			($1, 12, 'e12', '{s}', '{0}', '{1}', NULL)`, []any{source}},
		{`INSERT INTO snapshots (policy_id, name, created_at, revision, actions, initial_q, states, pairs) VALUES
			($1, 'morning', '2026-01-01T11:00:00Z', 1, '{a,b}', 0, 1, 1),
			($1, 'noon', '2026-01-01T13:00:00Z', 2, '{a,b}', 0, 1, 2),
			($1, 'dawn', '2026-01-01T09:00:00Z', 0, '{a,b}', 0, 0, 0),
			($2, 'replayed', '2026-01-01T13:00:00Z', 1, '{a,b}', 0, 1, 2)`, []any{source, replay}},
		{`INSERT INTO jobs (policy_id, kind, status, spec) VALUES ($1, 'replay', 'succeeded',
			jsonb_build_object('target_policy_id', $2::integer, 'episodes', '{"first_seq": 10, "last_seq": 12, "episodes": 3}'::jsonb))`, []any{source, replay}},
	} {
		if _, err := conn.Exec(ctx, stmt.sql, stmt.args...); err != nil {
			t.Fatal(err)
		}
	}
	if _, err := provider.UpTo(ctx, 7); err != nil {
		t.Fatalf("migration 7: %v", err)
	}
	position := func(query string, args ...any) int64 {
		t.Helper()
		var seq int64
		if err := conn.QueryRow(ctx, query, args...).Scan(&seq); err != nil {
			t.Fatal(err)
		}
		return seq
	}
	policy := func(id int32) int64 {
		return position(`SELECT trained_through_seq FROM policies WHERE policy_id = $1`, id)
	}
	snapshot := func(id int32, name string) int64 {
		return position(`SELECT trained_through_seq FROM snapshots WHERE policy_id = $1 AND name = $2`, id, name)
	}
	for _, c := range []struct {
		what      string
		got, want int64
	}{
		{"the source policy: its last trained episode", policy(source), 11},
		{"the replay's policy: the end of the replayed window", policy(replay), 12},
		{"a snapshot taken after the first batch", snapshot(source, "morning"), 10},
		{"a snapshot taken after the second batch", snapshot(source, "noon"), 11},
		// Nothing was trained before dawn: every stored episode is held out.
		{"a snapshot taken before any training", snapshot(source, "dawn"), 9},
		{"a snapshot of the replay's policy", snapshot(replay, "replayed"), 12},
	} {
		if c.got != c.want {
			t.Errorf("%s: position %d, want %d", c.what, c.got, c.want)
		}
	}
}

// Migration 13 keeps the history rows stored so far as coarse rows, with
// their backlog samples; rolling it back folds fine rows into one-minute
// rows without losing their sums.
func TestHistoryTiersKeepStoredRows(t *testing.T) {
	ctx := context.Background()
	url := pgtest.NewDatabase(t)
	provider, _ := embeddedMigrations(t, url)
	if _, err := provider.DownTo(ctx, 12); err != nil {
		t.Fatalf("roll back to before migration 13: %v", err)
	}
	conn, err := pgx.Connect(ctx, url)
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close(ctx)
	exec := func(sql string, args ...any) {
		t.Helper()
		if _, execErr := conn.Exec(ctx, sql, args...); execErr != nil {
			t.Fatal(execErr)
		}
	}
	var id int32
	if err = conn.QueryRow(ctx, `INSERT INTO policies (name, actions, gamma, alpha, epsilon, epsilon_min, visit, initial_q, max_states)
		VALUES ('kept', '{a,b}', 1, 0.1, 0.1, 0, 'first', 0, 1000) RETURNING policy_id`).Scan(&id); err != nil {
		t.Fatal(err)
	}
	exec(`INSERT INTO training_history (policy_id, bucket_start, batches, episodes, steps, sum_return, sum_abs_delta,
		updates, greedy_changes, new_states, new_pairs, backlog, last_batch_at)
		VALUES ($1, '2026-01-01T10:00:00Z', 3, 30, 90, 12.5, 4, 80, 2, 5, 9, 17, '2026-01-01T10:00:40Z')`, id)
	if _, err = provider.UpTo(ctx, 13); err != nil {
		t.Fatalf("migration 13: %v", err)
	}
	var fine bool
	var episodes, backlog int64
	if err = conn.QueryRow(ctx, `SELECT fine, episodes, backlog FROM training_history WHERE policy_id = $1`, id).Scan(&fine, &episodes, &backlog); err != nil {
		t.Fatal(err)
	}
	if fine || episodes != 30 || backlog != 17 {
		t.Fatalf("the stored row is now fine=%v with %d episodes, backlog %d; want a coarse row as it was", fine, episodes, backlog)
	}

	// Two fine seconds of the same minute, one without a backlog sample.
	exec(`INSERT INTO training_history (policy_id, fine, bucket_start, batches, episodes, steps, sum_return, sum_abs_delta,
		updates, greedy_changes, new_states, new_pairs, backlog, last_batch_at) VALUES
		($1, true, '2026-01-01T10:00:50Z', 1, 10, 30, 2.5, 1, 20, 1, 1, 1, NULL, '2026-01-01T10:00:50Z'),
		($1, true, '2026-01-01T10:01:05Z', 1, 5, 15, 1, 1, 10, 0, 0, 0, 4, '2026-01-01T10:01:05Z')`, id)
	if _, err = provider.DownTo(ctx, 12); err != nil {
		t.Fatalf("roll back migration 13: %v", err)
	}
	rows, err := conn.Query(ctx, `SELECT bucket_start, episodes, sum_return, backlog FROM training_history WHERE policy_id = $1 ORDER BY bucket_start`, id)
	if err != nil {
		t.Fatal(err)
	}
	type row struct {
		Start     time.Time
		Episodes  int64
		SumReturn float64
		Backlog   int64
	}
	got, err := pgx.CollectRows(rows, pgx.RowToStructByPos[row])
	if err != nil {
		t.Fatal(err)
	}
	minute := time.Date(2026, 1, 1, 10, 0, 0, 0, time.UTC)
	want := []row{{minute, 40, 15, 17}, {minute.Add(time.Minute), 5, 1, 4}}
	if len(got) != 2 || !got[0].Start.Equal(want[0].Start) || !got[1].Start.Equal(want[1].Start) ||
		got[0].Episodes != 40 || got[0].SumReturn != 15 || got[0].Backlog != 17 || got[1].Episodes != 5 || got[1].Backlog != 4 {
		t.Fatalf("after rolling back: %+v, want %+v", got, want)
	}
}

// embeddedMigrations opens the test database for goose and returns the
// provider of the embedded migrations and the connection it runs on,
// closed with the test.
func embeddedMigrations(t *testing.T, url string) (*goose.Provider, *sql.DB) {
	t.Helper()
	config, err := pgx.ParseConfig(url)
	if err != nil {
		t.Fatal(err)
	}
	db := stdlib.OpenDB(*config)
	t.Cleanup(func() { db.Close() })
	provider, err := goose.NewProvider(goose.DialectPostgres, db, migrations.Files)
	if err != nil {
		t.Fatal(err)
	}
	return provider, db
}
