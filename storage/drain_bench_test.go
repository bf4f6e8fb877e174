package storage_test

import (
	"context"
	"fmt"
	"testing"
	"time"

	"github.com/qtally/qtally/storage"
	"github.com/qtally/qtally/storage/pgtest"
	"github.com/qtally/qtally/training"
)

// BenchmarkDrain times one worker training a stored backlog to the end, as
// `qtally load drain` does: 50,000 episodes of 20 steps over 25,000 states
// x 4 actions (about 100k pairs) on a fresh policy, batches of up to 10,000
// episodes (the worker's default), on a durable PostgreSQL. Each iteration
// drains a fresh policy; the backlog is stored before the clock starts.
//
//	go test -run '^$' -bench Drain -benchtime 1x -count 3 ./storage/
func BenchmarkDrain(b *testing.B) {
	episodes, batch := 50_000, 10_000
	if testing.Short() {
		episodes, batch = 4_000, 1_000
	}
	ctx := context.Background()
	srv := pgtest.NewDurableServer(b)
	db, err := storage.Open(ctx, srv.URL(), 4, training.DefaultLimits())
	if err != nil {
		b.Fatal(err)
	}
	defer db.Close()
	eps := benchEpisodes(episodes)
	b.ResetTimer()
	var steps int
	var took time.Duration
	for i := range b.N {
		b.StopTimer()
		name := fmt.Sprintf("drain-%d", i)
		if _, _, err := db.PutPolicy(ctx, name, benchSettings()); err != nil {
			b.Fatal(err)
		}
		for j := range eps {
			eps[j].ID = fmt.Sprintf("%s-%d", name, j)
		}
		ingestForBench(b, db, name, eps)
		b.StartTimer()
		start := time.Now()
		for {
			report, trained, err := db.TrainBatch(ctx, training.BatchLimits{Episodes: batch}, training.Learn)
			if err != nil {
				b.Fatal(err)
			}
			if !trained {
				break
			}
			steps += report.Result.Steps
		}
		took += time.Since(start)
	}
	if steps != b.N*episodes*benchSteps {
		b.Fatalf("trained %d steps, stored %d", steps, b.N*episodes*benchSteps)
	}
	b.ReportMetric(float64(steps)/took.Seconds(), "steps/s")
}
