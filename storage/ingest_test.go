package storage_test

import (
	"context"
	"errors"
	"fmt"
	"sync"
	"testing"

	"github.com/qtally/qtally/storage"
	"github.com/qtally/qtally/storage/pgtest"
	"github.com/qtally/qtally/training"
)

func openDB(t testing.TB) *storage.DB {
	t.Helper()
	db, err := storage.Open(context.Background(), pgtest.NewDatabase(t), 20, training.DefaultLimits())
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(db.Close)
	return db
}

func episodes(ids ...int) []training.Episode {
	out := make([]training.Episode, len(ids))
	for i, id := range ids {
		out[i] = training.Episode{ID: fmt.Sprint(id), Steps: []training.Step{{State: "s", Action: "a", Reward: 1}}}
	}
	return out
}

// Concurrent requests carrying the same ids must store each id once and
// count every other copy as a duplicate, whichever request commits first.
func TestConcurrentIngestStoresEachIDOnce(t *testing.T) {
	ctx := context.Background()
	db := openDB(t)
	if _, _, err := db.PutPolicy(ctx, "dunning", training.Settings{Actions: []string{"a", "b"}, Gamma: 1, Alpha: 0.1, Visit: training.FirstVisit}); err != nil {
		t.Fatal(err)
	}
	const clients, idsPerBatch = 8, 50
	var mu sync.Mutex
	accepted, duplicates := 0, 0
	var wg sync.WaitGroup
	for c := range clients {
		wg.Add(1)
		go func() {
			defer wg.Done()
			// Every client posts ids 0..99 in its own order of batches.
			for b := range 2 {
				start := ((b + c) % 2) * idsPerBatch
				ids := make([]int, idsPerBatch)
				for i := range ids {
					ids[i] = start + i
				}
				res, err := db.Ingest(ctx, "dunning", episodes(ids...))
				if err != nil {
					t.Error(err)
					return
				}
				mu.Lock()
				accepted += res.Accepted
				duplicates += res.Duplicates
				mu.Unlock()
			}
		}()
	}
	wg.Wait()
	if accepted != 2*idsPerBatch || duplicates != (clients-1)*2*idsPerBatch {
		t.Fatalf("accepted %d, duplicates %d; want %d and %d", accepted, duplicates, 2*idsPerBatch, (clients-1)*2*idsPerBatch)
	}
	st, err := db.PolicyStatus(ctx, "dunning")
	if err != nil {
		t.Fatal(err)
	}
	if st.Episodes != 2*idsPerBatch || st.Backlog != 2*idsPerBatch {
		t.Fatalf("stored %d episodes, backlog %d; want %d", st.Episodes, st.Backlog, 2*idsPerBatch)
	}
}

// A refused batch stores nothing, even its valid episodes.
func TestInvalidBatchStoresNothing(t *testing.T) {
	ctx := context.Background()
	db := openDB(t)
	if _, _, err := db.PutPolicy(ctx, "dunning", training.Settings{Actions: []string{"a", "b"}, Gamma: 1, Alpha: 0.1, Visit: training.FirstVisit}); err != nil {
		t.Fatal(err)
	}
	batch := episodes(1, 2, 3)
	batch[2].Steps[0].Action = "unknown"
	if _, err := db.Ingest(ctx, "dunning", batch); err == nil {
		t.Fatal("invalid batch accepted")
	}
	st, err := db.PolicyStatus(ctx, "dunning")
	if err != nil {
		t.Fatal(err)
	}
	if st.Episodes != 0 {
		t.Fatalf("%d episodes stored from a refused batch", st.Episodes)
	}
	if _, err := db.Ingest(ctx, "nobody", episodes(1)); !errors.Is(err, training.ErrNotFound) {
		t.Fatalf("unknown policy: %v", err)
	}
}
