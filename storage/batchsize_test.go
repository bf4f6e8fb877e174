package storage_test

import (
	"context"
	"fmt"
	"slices"
	"testing"
	"time"

	"github.com/qtally/qtally/storage"
	"github.com/qtally/qtally/storage/pgtest"
	"github.com/qtally/qtally/training"
)

// With a batch sizer, a policy that kept up gets small batches when work
// arrives, and batches that double while they come back full.
func TestTrainBatchFollowsTheSizer(t *testing.T) {
	ctx := context.Background()
	db, err := storage.Open(ctx, pgtest.NewDatabase(t), 4, training.DefaultLimits())
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	// Any batch takes longer than a nanosecond, so keeping up means the
	// minimum.
	db.SetBatchSizer(&training.BatchSizer{Target: time.Nanosecond, Min: 10})
	if _, _, err := db.PutPolicy(ctx, "tickets", training.Settings{Actions: []string{"close", "escalate"}, Gamma: 1, Alpha: 0.5, Visit: training.EveryVisit}); err != nil {
		t.Fatal(err)
	}
	post := func(policy, prefix string, n int) {
		eps := make([]training.Episode, n)
		for i := range eps {
			eps[i] = training.Episode{ID: fmt.Sprintf("%s-%d", prefix, i), Steps: []training.Step{{State: "open", Action: "close", Reward: 1}}}
		}
		if _, err := db.Ingest(ctx, policy, eps); err != nil {
			t.Fatal(err)
		}
	}
	drain := func() []int {
		var sizes []int
		for {
			report, trained, err := db.TrainBatch(ctx, training.BatchLimits{Episodes: 1000}, training.Learn)
			if err != nil {
				t.Fatal(err)
			}
			if !trained {
				return sizes
			}
			sizes = append(sizes, report.Episodes)
		}
	}
	if got := drain(); got != nil {
		t.Fatalf("nothing posted, batches %v", got)
	}
	post("tickets", "a", 5)
	if got := drain(); !slices.Equal(got, []int{5}) {
		t.Fatalf("first batch of a policy: %v, want what was waiting", got)
	}
	post("tickets", "b", 500)
	if got, want := drain(), []int{10, 20, 40, 80, 160, 190}; !slices.Equal(got, want) {
		t.Fatalf("a burst after keeping up: batches %v, want %v", got, want)
	}

	// A batch that does not commit (its time ran out while it wrote) is
	// taken again at half its size, and grows back while full: a fresh
	// policy's first batch takes all 300 waiting.
	if _, _, err := db.PutPolicy(ctx, "refunds", training.Settings{Actions: []string{"close", "escalate"}, Gamma: 1, Alpha: 0.5, Visit: training.EveryVisit}); err != nil {
		t.Fatal(err)
	}
	post("refunds", "c", 300)
	batchCtx, timeUp := context.WithCancel(ctx)
	_, _, failed := db.TrainBatch(batchCtx, training.BatchLimits{Episodes: 1000}, func(in training.BatchInput) training.BatchResult {
		timeUp()
		return training.Learn(in)
	})
	if failed == nil {
		t.Fatal("a batch whose context ended before its write committed")
	}
	if got, want := drain(), []int{150, 150}; !slices.Equal(got, want) {
		t.Fatalf("after a failed batch of 300: batches %v, want %v", got, want)
	}
}
