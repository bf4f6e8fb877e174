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
	post := func(prefix string, n int) {
		eps := make([]training.Episode, n)
		for i := range eps {
			eps[i] = training.Episode{ID: fmt.Sprintf("%s-%d", prefix, i), Steps: []training.Step{{State: "open", Action: "close", Reward: 1}}}
		}
		if _, err := db.Ingest(ctx, "tickets", eps); err != nil {
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
	post("a", 5)
	if got := drain(); !slices.Equal(got, []int{5}) {
		t.Fatalf("first batch of a policy: %v, want what was waiting", got)
	}
	post("b", 500)
	if got, want := drain(), []int{10, 20, 40, 80, 160, 190}; !slices.Equal(got, want) {
		t.Fatalf("a burst after keeping up: batches %v, want %v", got, want)
	}
}
