package storage_test

import (
	"context"
	"errors"
	"fmt"
	"sync"
	"testing"
	"time"

	"github.com/qtally/qtally/storage"
	"github.com/qtally/qtally/training"
)

// An id is either posted or kept open, never both: a post and a recorded
// decision opening the same id at the same moment, many times over, end
// with exactly one of them accepted each time.
func TestPostAndOpeningOfOneIDNeverBothSucceed(t *testing.T) {
	ctx := context.Background()
	db := openDB(t)
	settings := training.DefaultSettings()
	settings.Actions = []string{"a", "b"}
	p, _, err := db.PutPolicy(ctx, "race", settings)
	if err != nil {
		t.Fatal(err)
	}
	batcher := db.NewDecisionBatcher(storage.GroupCommit{MaxBatch: 256, InFlight: 4, Window: time.Millisecond})
	runCtx, stop := context.WithCancel(ctx)
	done := make(chan struct{})
	go func() { _ = batcher.Run(runCtx); close(done) }()
	defer func() { stop(); <-done }()

	posted, opened := 0, 0
	for i := range 60 {
		id := fmt.Sprintf("race-%d", i)
		var postErr, openErr error
		var wg sync.WaitGroup
		wg.Go(func() {
			_, postErr = db.Ingest(ctx, "race", []training.Episode{{ID: id, Steps: []training.Step{{State: "s", Action: "a", Reward: 1}}}})
		})
		wg.Go(func() {
			_, _, openErr = batcher.Record(ctx, training.Decision{PolicyID: p.ID, Episode: id, Step: 0, State: "s",
				Probability: 1, Allowed: training.ActionSet{3}, Mode: training.Greedy})
		})
		wg.Wait()
		var verr *training.ValidationError
		switch {
		case postErr == nil && errors.Is(openErr, training.ErrConflict):
			posted++
		case openErr == nil && errors.As(postErr, &verr):
			opened++
		default:
			t.Fatalf("%s: post %v, opening %v; want exactly one refused", id, postErr, openErr)
		}
	}
	t.Logf("60 races: the post won %d, the opening %d", posted, opened)
}

// A Record after the batcher's Run has ended is refused as unavailable
// rather than left waiting.
func TestStoppedBatcherRefusesDecisions(t *testing.T) {
	db := openDB(t)
	batcher := db.NewDecisionBatcher(storage.GroupCommit{MaxBatch: 8, InFlight: 4, Window: time.Millisecond})
	ctx, stop := context.WithCancel(context.Background())
	stop()
	if err := batcher.Run(ctx); err != nil {
		t.Fatal(err)
	}
	_, _, err := batcher.Record(context.Background(), training.Decision{Episode: "e"})
	if !errors.Is(err, training.ErrUnavailable) {
		t.Fatalf("Record after Run ended: %v, want unavailable", err)
	}
}
