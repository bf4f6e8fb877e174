package storage

import (
	"context"

	"github.com/jackc/pgx/v5"
)

// BeginTrainingBatch opens a transaction holding a policy's training lock,
// as a training batch does, for tests of what waits for one.
func (db *DB) BeginTrainingBatch(ctx context.Context, policyID int32) (pgx.Tx, error) {
	tx, err := db.pool.Begin(ctx)
	if err != nil {
		return nil, err
	}
	if err := lockTraining(ctx, tx, policyID); err != nil {
		_ = tx.Rollback(ctx)
		return nil, err
	}
	return tx, nil
}

// CountWaitingAdvisoryLocks counts advisory lock requests not granted yet.
func (db *DB) CountWaitingAdvisoryLocks(ctx context.Context) (int, error) {
	var n int
	err := db.pool.QueryRow(ctx, `SELECT count(*) FROM pg_locks WHERE locktype = 'advisory' AND NOT granted`).Scan(&n)
	return n, err
}
