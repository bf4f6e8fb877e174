package storage_test

import (
	"context"
	"errors"
	"fmt"
	"testing"

	_ "github.com/jackc/pgx/v5/stdlib" // the "pgx" database/sql driver goose runs on

	"github.com/qtally/qtally/storage"
	"github.com/qtally/qtally/storage/pgtest"
	"github.com/qtally/qtally/training"
)

// A database from before state quotas keeps every state it has: the
// upgrade records the learned states and those of untrained episodes, and
// gives each policy at least the states it holds as its max_states.
func TestUpgradeKeepsStatesWithinTheirQuota(t *testing.T) {
	ctx := context.Background()
	url := pgtest.NewDatabase(t)
	provider, _ := embeddedMigrations(t, url)
	if _, err := provider.DownTo(ctx, 8); err != nil {
		t.Fatal(err)
	}
	// A policy of 1,024 actions whose 1,500 states are more than a new
	// policy of that width may take (976), learned and waiting.
	actions := make([]string, 1024)
	for i := range actions {
		actions[i] = fmt.Sprintf("a%d", i)
	}
	pgtest.Exec(t, url, `INSERT INTO policies (name, actions, gamma, alpha, epsilon, epsilon_min, visit, initial_q)
		VALUES ('legacy', $1, 1, 0.1, 0.1, 0, 'first', 0), ('small', '{a,b}', 1, 0.1, 0.1, 0, 'first', 0)`, actions)
	pgtest.Exec(t, url, `INSERT INTO q_values (policy_id, state, action, q, visits, last_delta, updated_at, revision)
		SELECT 1, 'learned-' || i, 0, 0, 1, 0, now(), 1 FROM generate_series(1, 1000) i`)
	pgtest.Exec(t, url, `INSERT INTO episodes (policy_id, episode_id, states, actions, rewards)
		SELECT 1, 'e' || i, ARRAY['learned-' || i, 'waiting-' || i], '{0,1}', '{0,1}' FROM generate_series(500, 1000) i`)
	if _, err := storage.Migrate(ctx, url); err != nil {
		t.Fatal(err)
	}

	db, err := storage.Open(ctx, url, 4, training.DefaultLimits())
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	legacy, err := db.PolicyByName(ctx, "legacy")
	if err != nil {
		t.Fatal(err)
	}
	// 1,000 learned states and 501 waiting ones, each counted once.
	if legacy.MaxStates != 1501 {
		t.Fatalf("legacy policy's max_states after the upgrade: %d, want its 1501 states", legacy.MaxStates)
	}
	small, err := db.PolicyByName(ctx, "small")
	if err != nil {
		t.Fatal(err)
	}
	if small.MaxStates != training.DefaultMaxStates {
		t.Fatalf("small policy's max_states after the upgrade: %d, want %d", small.MaxStates, training.DefaultMaxStates)
	}
	// Every held state is known: posting them again is no new state, one
	// more is beyond the quota.
	again := []training.Episode{{ID: "again", Steps: []training.Step{{State: "learned-1", Action: actions[0]}, {State: "waiting-1000", Action: actions[1]}}}}
	if _, err := db.Ingest(ctx, "legacy", again); err != nil {
		t.Fatalf("states held before the upgrade refused: %v", err)
	}
	more := []training.Episode{{ID: "more", Steps: []training.Step{{State: "brand-new", Action: actions[0]}}}}
	if _, err := db.Ingest(ctx, "legacy", more); !errors.Is(err, training.ErrQuota) {
		t.Fatalf("a new state beyond the kept quota: %v, want a quota error", err)
	}
}
