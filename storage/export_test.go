package storage

import (
	"context"
	"fmt"
	"strings"

	"github.com/jackc/pgx/v5"

	"github.com/qtally/qtally/training"
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
func (db *DB) RowsExaminedByBatchRead(ctx context.Context, policyID int32, after int64, limits training.BatchLimits, generic bool) (int64, error) {
	return db.rowsExamined(ctx, generic, untrainedEpisodesQuery, "integer, bigint, integer, bigint",
		int64(policyID), after, int64(limits.Episodes), stepBound(limits))
}

// RowsExaminedByBacklogs is RowsExaminedByBatchRead for the read of every
// policy's backlog.
func (db *DB) RowsExaminedByBacklogs(ctx context.Context, generic bool) (int64, error) {
	return db.rowsExamined(ctx, generic, backlogsQuery, "")
}

func (db *DB) rowsExamined(ctx context.Context, generic bool, query, paramTypes string, args ...int64) (int64, error) {
	mode := "force_custom_plan"
	if generic {
		mode = "force_generic_plan"
	}
	prepare, execute := `PREPARE examined AS `, `EXECUTE examined`
	if len(args) > 0 {
		values := make([]string, len(args))
		for i, a := range args {
			values[i] = fmt.Sprint(a)
		}
		prepare = `PREPARE examined(` + paramTypes + `) AS `
		execute += `(` + strings.Join(values, ", ") + `)`
	}
	var examined int64
	err := db.WithTx(ctx, func(tx pgx.Tx) error {
		if _, err := tx.Exec(ctx, `SELECT set_config('plan_cache_mode', $1, true)`, mode); err != nil {
			return err
		}
		if _, err := tx.Exec(ctx, prepare+query); err != nil {
			return err
		}
		var plan []struct{ Plan planNode }
		if err := tx.QueryRow(ctx, `EXPLAIN (ANALYZE, FORMAT JSON) `+execute).Scan(&plan); err != nil {
			return err
		}
		if _, err := tx.Exec(ctx, `DEALLOCATE examined`); err != nil {
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
