package storage_test

import (
	"context"
	"testing"
	"time"

	"github.com/qtally/qtally/storage"
	"github.com/qtally/qtally/storage/pgtest"
	"github.com/qtally/qtally/training"
)

// A policy deleted while a training batch of it runs waits for the batch,
// which updates the policy's row under the training lock, instead of
// deadlocking with it.
func TestDeletePolicyWaitsForATrainingBatch(t *testing.T) {
	ctx := context.Background()
	db, err := storage.Open(ctx, pgtest.NewDatabase(t), 4, training.DefaultLimits())
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(db.Close)
	p, _, err := db.PutPolicy(ctx, "parcels", training.Settings{Actions: []string{"van", "bike"}, Gamma: 1, Alpha: 0.1, Visit: training.FirstVisit})
	if err != nil {
		t.Fatal(err)
	}

	batch, err := db.BeginTrainingBatch(ctx, p.ID)
	if err != nil {
		t.Fatal(err)
	}
	defer batch.Rollback(ctx) //nolint:errcheck // only releases the lock; nothing was written
	deleted := make(chan error, 1)
	go func() { deleted <- db.DeletePolicy(ctx, "parcels") }()
	// The deletion now waits for the training lock.
	deadline := time.Now().Add(30 * time.Second)
	for waiting := 0; waiting == 0; {
		if waiting, err = db.CountWaitingAdvisoryLocks(ctx); err != nil {
			t.Fatal(err)
		}
		if time.Now().After(deadline) {
			t.Fatal("the deletion never waited for the training lock")
		}
		time.Sleep(10 * time.Millisecond)
	}
	// The batch moves the policy's watermark, as training does, and commits.
	if _, err := batch.Exec(ctx, `UPDATE policies SET trained_through = trained_through WHERE policy_id = $1`, p.ID); err != nil {
		t.Fatalf("the batch's update of the policy: %v", err)
	}
	if err := batch.Commit(ctx); err != nil {
		t.Fatal(err)
	}
	if err := <-deleted; err != nil {
		t.Fatalf("delete: %v", err)
	}
}
