package storage_test

import (
	"context"
	"database/sql"
	"maps"
	"strings"
	"testing"

	"github.com/pressly/goose/v3"

	"github.com/qtally/qtally/storage"
	"github.com/qtally/qtally/storage/pgtest"
	"github.com/qtally/qtally/training"
)

// watermarkMigration is the migration that replaced the per-episode
// trained_at stamp with a per-policy training watermark.
const watermarkMigration = 10

// migrator returns a goose provider over the embedded migrations and the
// version just before the watermark migration.
func migrator(t *testing.T, url string) (*goose.Provider, int64) {
	t.Helper()
	provider, _ := embeddedMigrations(t, url)
	var before int64
	for _, s := range provider.ListSources() {
		if s.Version < watermarkMigration {
			before = max(before, s.Version)
		}
	}
	return provider, before
}

// oldEpisodes stores episodes the way the schema before the watermark did:
// trained ones carry trained_at. Each id is the policy and a letter for its
// place among the policy's episodes (a, b, ...); trained[i] says whether
// the i-th of this call is trained.
func oldEpisodes(t *testing.T, conn *sql.DB, policy string, trained ...bool) {
	t.Helper()
	for _, tr := range trained {
		if _, err := conn.Exec(`
			INSERT INTO episodes (policy_id, episode_id, states, actions, rewards, trained_at)
			SELECT p.policy_id, $1 || '-' || chr(97 + (SELECT count(*)::int FROM episodes e WHERE e.policy_id = p.policy_id)),
			       '{s}', '{0}', '{1}', CASE WHEN $2 THEN now() END
			FROM policies p WHERE p.name = $1`, policy, tr); err != nil {
			t.Fatal(err)
		}
	}
}

// Upgrading keeps what was trained trained and what was not untrained: the
// watermark of each policy is the seq of its last trained episode, and
// training after the upgrade takes exactly the untrained ones.
func TestWatermarkMigrationKeepsTrainingPosition(t *testing.T) {
	ctx := context.Background()
	url := pgtest.NewDatabase(t)
	provider, before := migrator(t, url)
	if _, err := provider.DownTo(ctx, before); err != nil {
		t.Fatal(err)
	}
	conn, err := sql.Open("pgx", url)
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	for _, name := range []string{"half", "all", "none", "empty"} {
		if _, err = conn.Exec(`INSERT INTO policies (name, actions, gamma, alpha, epsilon, epsilon_min, visit, initial_q, max_states)
			VALUES ($1, '{go}', 1, 0.5, 0.1, 0.1, 'every', 0, 1000)`, name); err != nil {
			t.Fatal(err)
		}
	}
	// Interleaved, so seqs of one policy are not contiguous.
	oldEpisodes(t, conn, "half", true, true)
	oldEpisodes(t, conn, "all", true)
	oldEpisodes(t, conn, "none", false)
	oldEpisodes(t, conn, "half", false, false)
	oldEpisodes(t, conn, "all", true)
	if _, err = provider.Up(ctx); err != nil {
		t.Fatal(err)
	}

	db, err := storage.Open(ctx, url, 4, training.DefaultLimits())
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	backlogs, err := db.Backlogs(ctx)
	if err != nil {
		t.Fatal(err)
	}
	got := map[string]int64{}
	for _, b := range backlogs {
		got[b.Policy] = b.Episodes
	}
	if want := map[string]int64{"half": 2, "all": 0, "none": 1, "empty": 0}; !maps.Equal(got, want) {
		t.Fatalf("backlogs after the upgrade %v, want %v", got, want)
	}
	trainedIDs := map[string]int{}
	for {
		_, found, err := db.TrainBatch(ctx, training.BatchLimits{Episodes: 100}, func(in training.BatchInput) training.BatchResult {
			for _, ep := range in.Episodes {
				trainedIDs[ep.ID]++
			}
			return training.Learn(in)
		})
		if err != nil {
			t.Fatal(err)
		}
		if !found {
			break
		}
	}
	if want := map[string]int{"half-c": 1, "half-d": 1, "none-a": 1}; !maps.Equal(trainedIDs, want) {
		t.Fatalf("trained after the upgrade %v, want %v", trainedIDs, want)
	}
}

// A database where a trained episode follows an untrained one has no exact
// watermark: the upgrade stops and says which policy and where.
func TestWatermarkMigrationRefusesAGap(t *testing.T) {
	ctx := context.Background()
	url := pgtest.NewDatabase(t)
	provider, before := migrator(t, url)
	if _, err := provider.DownTo(ctx, before); err != nil {
		t.Fatal(err)
	}
	conn, err := sql.Open("pgx", url)
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	if _, err = conn.Exec(`INSERT INTO policies (name, actions, gamma, alpha, epsilon, epsilon_min, visit, initial_q, max_states)
		VALUES ('gappy', '{go}', 1, 0.5, 0.1, 0.1, 'every', 0, 1000)`); err != nil {
		t.Fatal(err)
	}
	oldEpisodes(t, conn, "gappy", true, false, true)
	_, err = provider.Up(ctx)
	if err == nil || !strings.Contains(err.Error(), "trained episodes after its untrained episode") {
		t.Fatalf("upgrade of a database with a gap in training: %v", err)
	}
}
