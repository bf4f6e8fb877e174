package storage

import (
	"context"
	"fmt"

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

// RowsExaminedByBatchRead runs a training batch's read of untrained
// episodes under EXPLAIN ANALYZE, as a prepared statement planned for these
// values (custom) or for any values (generic, as after a few executions),
// and returns the rows its plan's nodes produced or filtered out, summed
// over all their loops: the work the read did, whatever the timing.
func (db *DB) RowsExaminedByBatchRead(ctx context.Context, policyID int32, after int64, limit int, generic bool) (int64, error) {
	mode := "force_custom_plan"
	if generic {
		mode = "force_generic_plan"
	}
	var examined int64
	err := db.WithTx(ctx, func(tx pgx.Tx) error {
		if _, err := tx.Exec(ctx, `SELECT set_config('plan_cache_mode', $1, true)`, mode); err != nil {
			return err
		}
		if _, err := tx.Exec(ctx, `PREPARE batch_read(integer, bigint, integer) AS `+untrainedEpisodesQuery); err != nil {
			return err
		}
		var plan []struct{ Plan planNode }
		if err := tx.QueryRow(ctx, fmt.Sprintf(`EXPLAIN (ANALYZE, FORMAT JSON) EXECUTE batch_read(%d, %d, %d)`, policyID, after, limit)).Scan(&plan); err != nil {
			return err
		}
		if _, err := tx.Exec(ctx, `DEALLOCATE batch_read`); err != nil {
			return err
		}
		for _, p := range plan {
			examined += p.Plan.examined()
		}
		return nil
	})
	return examined, err
}

// planNode is a node of EXPLAIN's JSON output; PostgreSQL reports its rows
// and removed rows per loop.
type planNode struct {
	Rows            float64    `json:"Actual Rows"`
	Loops           float64    `json:"Actual Loops"`
	RemovedByFilter float64    `json:"Rows Removed by Filter"`
	RemovedByJoin   float64    `json:"Rows Removed by Join Filter"`
	RemovedRecheck  float64    `json:"Rows Removed by Index Recheck"`
	Plans           []planNode `json:"Plans"`
}

func (n planNode) examined() int64 {
	total := int64((n.Rows + n.RemovedByFilter + n.RemovedByJoin + n.RemovedRecheck) * n.Loops)
	for _, child := range n.Plans {
		total += child.examined()
	}
	return total
}
