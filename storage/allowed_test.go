package storage_test

import (
	"context"
	"fmt"
	"math"
	"slices"
	"testing"

	_ "github.com/jackc/pgx/v5/stdlib" // the "pgx" database/sql driver goose runs on
	"github.com/pressly/goose/v3"

	"github.com/qtally/qtally/storage"
	"github.com/qtally/qtally/storage/pgtest"
	"github.com/qtally/qtally/training"
)

// Allowed sets go through COPY and come back with the episodes exactly,
// at the widest a policy can be (1024 actions, 128 bytes a step); an
// episode without any is stored as NULL and reads back as no set.
func TestAllowedSetsRoundTrip(t *testing.T) {
	ctx := context.Background()
	db := openDB(t)
	actions := make([]string, training.MaxActions)
	for i := range actions {
		actions[i] = fmt.Sprintf("offer-%d", i)
	}
	if _, _, err := db.PutPolicy(ctx, "offers", training.Settings{Actions: actions, Gamma: 1, Alpha: 0.1, Visit: training.FirstVisit}); err != nil {
		t.Fatal(err)
	}
	p := 0.5
	batch := []training.Episode{
		{ID: "masked", Steps: []training.Step{
			{State: "s", Action: "offer-1023", Reward: 1, Probability: &p, Allowed: []string{"offer-1023", "offer-0", "offer-512"}},
			{State: "s", Action: "offer-7", Reward: 0, Probability: &p},
		}},
		{ID: "plain", Steps: []training.Step{{State: "s", Action: "offer-3", Reward: 2, Probability: &p}}},
	}
	if _, err := db.Ingest(ctx, "offers", batch); err != nil {
		t.Fatal(err)
	}
	pol, err := db.PolicyByName(ctx, "offers")
	if err != nil {
		t.Fatal(err)
	}
	var got []training.StoredEpisode
	err = db.ReadEpisodes(ctx, pol.ID, training.EpisodeSpan{FirstSeq: 0, LastSeq: math.MaxInt64}, func(ep training.StoredEpisode) error {
		got = append(got, ep)
		return nil
	})
	if err != nil || len(got) != 2 {
		t.Fatalf("read back %d episodes: %v", len(got), err)
	}
	masked, plain := got[0], got[1]
	if len(masked.Allowed) != 2*128 {
		t.Fatalf("stored %d bytes of sets for 2 steps of 1024 actions, want 256", len(masked.Allowed))
	}
	set := masked.AllowedAt(0)
	var members []int16
	for a := range int16(training.MaxActions) {
		if set.Has(a) {
			members = append(members, a)
		}
	}
	if !slices.Equal(members, []int16{0, 512, 1023}) || masked.AllowedAt(1) != nil {
		t.Errorf("step 0's set reads back as %v (want [0 512 1023]); step 1's as %v (want none)", members, masked.AllowedAt(1))
	}
	if plain.Allowed != nil || plain.StepsWithoutAllowed() != 1 {
		t.Errorf("an episode posted without sets reads back with %v", plain.Allowed)
	}
}

// An episode stored before steps could carry allowed sets keeps its data
// through the migration that adds them and reads back as having none.
func TestEpisodesStoredBeforeAllowedSetsReadAsHavingNone(t *testing.T) {
	ctx := context.Background()
	url := pgtest.NewDatabase(t)
	migrator, _ := embeddedMigrations(t, url)
	down, err := migrator.DownTo(ctx, 5)
	if err != nil || !slices.ContainsFunc(down, func(r *goose.MigrationResult) bool { return r.Source.Version == 6 }) {
		t.Fatalf("rolling back to version 5 ran %v: %v", down, err)
	}
	pgtest.Exec(t, url, `INSERT INTO policies (name, actions, gamma, alpha, epsilon, epsilon_min, visit, initial_q)
		VALUES ('legacy', '{a,b}', 1, 0.1, 0.1, 0, 'first', 0)`)
	pgtest.Exec(t, url, `INSERT INTO episodes (policy_id, episode_id, states, actions, rewards, probabilities)
		SELECT policy_id, 'old-1', '{s,t}', '{1,0}', '{2,3}', '{0.5,0.25}' FROM policies WHERE name = 'legacy'`)
	if _, err = migrator.Up(ctx); err != nil {
		t.Fatal(err)
	}
	db, err := storage.Open(ctx, url, 4, training.DefaultLimits())
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	pol, err := db.PolicyByName(ctx, "legacy")
	if err != nil {
		t.Fatal(err)
	}
	var got []training.StoredEpisode
	err = db.ReadEpisodes(ctx, pol.ID, training.EpisodeSpan{FirstSeq: 0, LastSeq: math.MaxInt64}, func(ep training.StoredEpisode) error {
		got = append(got, ep)
		return nil
	})
	if err != nil || len(got) != 1 {
		t.Fatalf("read back %d episodes: %v", len(got), err)
	}
	if ep := got[0]; ep.ID != "old-1" || !slices.Equal(ep.Rewards, []float64{2, 3}) || !slices.Equal(ep.Probabilities, []float64{0.5, 0.25}) ||
		ep.Allowed != nil || ep.StepsWithoutAllowed() != 2 {
		t.Fatalf("the old episode reads back as %+v", ep)
	}
}
