package storage_test

import (
	"context"
	"testing"
	"time"

	"github.com/qtally/qtally/storage"
	"github.com/qtally/qtally/training"
)

// Choices made from an in-memory copy reach the status page's report
// exactly once, also when a flush fails and the next one carries its
// counts; rows past the history window and counts of an erased policy are
// not kept.
func TestChoiceCountsFlushOnce(t *testing.T) {
	ctx := context.Background()
	h := storage.DefaultHistory()
	db, conn := setup(t, h)
	replica := training.NewReplica(db)
	choose := func(n int, action string, mode training.Mode) {
		t.Helper()
		for range n {
			if _, err := replica.Choose(ctx, "parcels", training.ChooseRequest{State: "zone 1", Mode: mode, Allowed: []string{action}}); err != nil {
				t.Fatal(err)
			}
		}
	}
	choose(7, "van", training.Explore)
	failed, cancel := context.WithCancel(ctx)
	cancel()
	if err := replica.FlushChoices(failed, db); err == nil {
		t.Fatal("a flush with a cancelled context succeeded")
	}
	choose(3, "bike", training.Explore)
	if err := replica.FlushChoices(ctx, db); err != nil {
		t.Fatal(err)
	}
	// A second flush has nothing new to add.
	if err := replica.FlushChoices(ctx, db); err != nil {
		t.Fatal(err)
	}
	report, err := db.PolicyReport(ctx, "parcels", time.Hour, 1)
	if err != nil {
		t.Fatal(err)
	}
	byAction := map[int16]int64{}
	for _, b := range report.ChoiceBuckets {
		if !b.Explore || b.Explored || b.KnownState || b.Width != h.Bucket {
			t.Fatalf("bucket %+v: want explore mode, not explored (one allowed action), unknown state, %v wide", b, h.Bucket)
		}
		byAction[b.Action] += b.Count
	}
	if byAction[0] != 7 || byAction[1] != 3 {
		t.Fatalf("stored choices by action %v, want 7 van and 3 bike", byAction)
	}
	view := report.Choices(report.Now.Add(-time.Hour), report.Now, 180)
	var total int64
	for _, p := range view.Points {
		total += p.Total
		if p.Unknown != p.Total || p.Explored != 0 {
			t.Fatalf("point %+v: every choice met an unknown state and none explored", p)
		}
	}
	if total != 10 {
		t.Fatalf("the binned choices add up to %d, want 10", total)
	}

	// A choice recorded in an open episode counts once; asked again, the
	// recorded answer is not a new choice.
	batcher := db.NewDecisionBatcher(storage.GroupCommit{MaxBatch: 256, InFlight: 4, Window: time.Millisecond})
	runCtx, stop := context.WithCancel(ctx)
	done := make(chan struct{})
	go func() { _ = batcher.Run(runCtx); close(done) }()
	keeper := training.Keeper{Replica: replica, Recorder: batcher}
	for range 3 {
		if _, err := keeper.ChooseRecorded(ctx, "parcels", "trip-1", 0, training.ChooseRequest{State: "zone 2", Mode: training.Explore, Allowed: []string{"bike"}}); err != nil {
			t.Fatal(err)
		}
	}
	stop()
	<-done
	if err := replica.FlushChoices(ctx, db); err != nil {
		t.Fatal(err)
	}
	var stored int64
	if err := conn.QueryRow(ctx, `SELECT sum(choices) FROM choice_counts`).Scan(&stored); err != nil || stored != 11 {
		t.Fatalf("%d choices stored (%v), want the 10 before and the recorded one once", stored, err)
	}

	// A row older than the window goes with the next flush.
	if _, err := conn.Exec(ctx, `INSERT INTO choice_counts SELECT policy_id, now() - $1::interval - interval '1 hour', 0, true, false, false, 5 FROM policies`,
		h.Window.String()); err != nil {
		t.Fatal(err)
	}
	choose(1, "van", training.Explore)
	if err := replica.FlushChoices(ctx, db); err != nil {
		t.Fatal(err)
	}
	var rows, old int
	if err := conn.QueryRow(ctx, `SELECT count(*), count(*) FILTER (WHERE bucket_start < now() - $1::interval) FROM choice_counts`, h.Window.String()).Scan(&rows, &old); err != nil {
		t.Fatal(err)
	}
	if old != 0 || rows < 2 {
		t.Fatalf("%d rows, %d older than the window: want the old row dropped and the new ones kept", rows, old)
	}

	// Counts of a policy erased before they were flushed are dropped.
	choose(2, "bike", training.Explore)
	if err := db.DeletePolicy(ctx, "parcels"); err != nil {
		t.Fatal(err)
	}
	if err := replica.FlushChoices(ctx, db); err != nil {
		t.Fatal(err)
	}
	if err := conn.QueryRow(ctx, `SELECT count(*) FROM choice_counts`).Scan(&rows); err != nil || rows != 0 {
		t.Fatalf("%d rows left after erasing the policy (%v)", rows, err)
	}
}
