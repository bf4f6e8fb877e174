package storage_test

import (
	"context"
	"fmt"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/qtally/qtally/storage"
	"github.com/qtally/qtally/storage/pgtest"
	"github.com/qtally/qtally/training"
)

// BenchmarkRecordDecisions records b.N decisions from 64 concurrent
// callers, each the next step of its own open episode, through the group
// commit on a durable PostgreSQL, without HTTP: what recording costs the
// database side.
//
//	go test -run '^$' -bench BenchmarkRecordDecisions -benchtime 20000x ./storage
func BenchmarkRecordDecisions(b *testing.B) {
	ctx := context.Background()
	db, p := benchPolicy(b, 20)
	batcher := db.NewDecisionBatcher(serviceGroupCommit)
	var batches, decisions atomic.Int64
	batcher.Observe = func(n int, _ time.Duration) { batches.Add(1); decisions.Add(int64(n)) }
	runCtx, stop := context.WithCancel(ctx)
	done := make(chan struct{})
	go func() { _ = batcher.Run(runCtx); close(done) }()
	defer func() { stop(); <-done }()

	const callers = 64
	var next atomic.Int64
	var wg sync.WaitGroup
	b.ResetTimer()
	for c := range callers {
		wg.Go(func() {
			for step := 0; next.Add(1) <= int64(b.N); step++ {
				d := training.Decision{PolicyID: p.ID, Episode: fmt.Sprintf("e%d", c), Step: step, State: "s",
					Probability: 1, Allowed: training.ActionSet{7}, Mode: training.Explore}
				if _, _, err := batcher.Record(ctx, d); err != nil {
					b.Error(err)
					return
				}
			}
		})
	}
	wg.Wait()
	b.StopTimer()
	b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "decisions/s")
	if n := batches.Load(); n > 0 {
		b.ReportMetric(float64(decisions.Load())/float64(n), "decisions/commit")
	}
}

// BenchmarkAddReward adds rewards, one at a time, to the latest decision
// of an open episode of 1 and of 1,000 decisions (the default most an
// open episode keeps): what an addition costs must not grow with the
// episode.
//
//	go test -run '^$' -bench BenchmarkAddReward -benchtime 2000x ./storage
func BenchmarkAddReward(b *testing.B) {
	ctx := context.Background()
	db, p := benchPolicy(b, 4)
	decisions, rewards := db.NewDecisionBatcher(serviceGroupCommit), db.NewRewardBatcher(serviceGroupCommit)
	runCtx, stop := context.WithCancel(ctx)
	var running sync.WaitGroup
	running.Go(func() { _ = decisions.Run(runCtx) })
	running.Go(func() { _ = rewards.Run(runCtx) })
	defer func() { stop(); running.Wait() }()

	// Both episodes are recorded first, so that both additions run
	// against the same table.
	lengths := []int{1, 1000}
	for _, steps := range lengths {
		for step := range steps {
			d := training.Decision{PolicyID: p.ID, Episode: fmt.Sprintf("e%d", steps), Step: step, State: "s",
				Probability: 1, Allowed: training.ActionSet{7}, Mode: training.Explore}
			if _, _, err := decisions.Record(ctx, d); err != nil {
				b.Fatal(err)
			}
		}
	}
	for _, steps := range lengths {
		b.Run(fmt.Sprintf("steps=%d", steps), func(b *testing.B) {
			for b.Loop() {
				if _, err := rewards.AddReward(ctx, "bench", fmt.Sprintf("e%d", steps), training.RewardAddition{Reward: 1}); err != nil {
					b.Fatal(err)
				}
			}
		})
	}
}

// serviceGroupCommit is how the service commits decisions and rewards.
var serviceGroupCommit = storage.GroupCommit{MaxBatch: 256, InFlight: 2, Window: 500 * time.Microsecond}

// benchPolicy opens a private durable PostgreSQL with a pool of conns and
// stores a policy "bench" of three actions in it; both go with b.
func benchPolicy(b *testing.B, conns int32) (*storage.DB, training.Policy) {
	b.Helper()
	db, err := storage.Open(context.Background(), pgtest.NewDurableServer(b).URL(), conns, training.DefaultLimits())
	if err != nil {
		b.Fatal(err)
	}
	b.Cleanup(db.Close)
	settings := training.DefaultSettings()
	settings.Actions = []string{"a", "b", "c"}
	p, _, err := db.PutPolicy(context.Background(), "bench", settings)
	if err != nil {
		b.Fatal(err)
	}
	return db, p
}
