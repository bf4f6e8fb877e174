package storage

import (
	"context"
	"errors"
	"fmt"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/qtally/qtally/internal/views"
	"github.com/qtally/qtally/training"
)

// HistorySettings say how finely training history is kept and for how
// long: fine rows for the recent past, so that a young policy already
// draws a curve, coarse rows for the rest of the window. Per policy the
// table holds at most FineWindow/FineBucket + Window/Bucket + 2 rows.
type HistorySettings struct {
	// FineBucket is the stretch of time one recent row sums up.
	FineBucket time.Duration
	// FineWindow is how long rows stay fine; older ones are rolled up
	// into coarse rows by the worker as it writes.
	FineWindow time.Duration
	// Bucket is the stretch of time one coarse row sums up.
	Bucket time.Duration
	// Window is how long rows are kept; older ones are dropped by the
	// worker as it writes.
	Window time.Duration
}

// DefaultHistory keeps one row per policy and second for an hour, and one
// per minute for two days: at most 3,600 + 2,880 + 2 small rows per policy.
func DefaultHistory() HistorySettings {
	return HistorySettings{FineBucket: time.Second, FineWindow: time.Hour, Bucket: time.Minute, Window: 48 * time.Hour}
}

// Validate refuses settings that would keep nothing, split nothing, or
// roll fine rows up into coarse ones they straddle.
func (h HistorySettings) Validate() error {
	switch {
	case h.FineBucket < time.Millisecond:
		return fmt.Errorf("the fine history bucket must be at least 1ms, got %v", h.FineBucket)
	case h.Bucket < h.FineBucket || h.Bucket%h.FineBucket != 0:
		return fmt.Errorf("the history bucket (%v) must be a whole number of fine buckets (%v)", h.Bucket, h.FineBucket)
	case h.FineWindow < 2*h.FineBucket:
		return fmt.Errorf("the fine history window (%v) must be at least two fine buckets (%v)", h.FineWindow, 2*h.FineBucket)
	case h.Window < 2*h.Bucket:
		return fmt.Errorf("the history window (%v) must be at least two buckets (%v)", h.Window, 2*h.Bucket)
	case h.Window < h.FineWindow:
		return fmt.Errorf("the history window (%v) must be at least the fine window (%v)", h.Window, h.FineWindow)
	}
	return nil
}

// backlogEvery is how often the backlog is sampled: every
// training.BacklogSampleEvery, or once per fine bucket when that is longer.
func (h HistorySettings) backlogEvery() time.Duration {
	return max(h.FineBucket, training.BacklogSampleEvery)
}

// SetHistory changes the history settings; call it before the worker or
// the API starts.
func (db *DB) SetHistory(h HistorySettings) error {
	if err := h.Validate(); err != nil {
		return err
	}
	db.history = h
	return nil
}

// History reports the history settings in force.
func (db *DB) History() HistorySettings {
	return db.history
}

// historySums adds a history row's sums to the stored row of its bucket:
// the rolled-up rows and a batch's own row add up the same way.
const historySums = `episodes = h.episodes + excluded.episodes,
	steps = h.steps + excluded.steps,
	sum_return = h.sum_return + excluded.sum_return,
	sum_abs_delta = h.sum_abs_delta + excluded.sum_abs_delta,
	updates = h.updates + excluded.updates,
	greedy_changes = h.greedy_changes + excluded.greedy_changes,
	new_states = h.new_states + excluded.new_states,
	new_pairs = h.new_pairs + excluded.new_pairs,`

// historyWrite adds a batch to its policy's current fine bucket, rolls the
// policy's fine rows that left the fine window up into coarse rows, and
// drops coarse rows that left the window, in one statement of the batch's
// transaction (the primary key makes each part touch only a few rows). The
// backlog is counted only when no row of the last backlogEvery holds a
// sample: counting costs time in proportion to the backlog. The statement
// must follow the one that advances the policy's training watermark, so
// that the count excludes the batch.
const historyWrite = `
	WITH expired AS (
		DELETE FROM training_history
		WHERE policy_id = $1 AND fine AND bucket_start < now() - $3::bigint * interval '1 microsecond'
		RETURNING *
	), rolled AS (
		INSERT INTO training_history AS h (policy_id, fine, bucket_start, batches, episodes, steps, sum_return,
			sum_abs_delta, updates, greedy_changes, new_states, new_pairs, backlog, last_batch_at)
		SELECT $1, false, date_bin($4::bigint * interval '1 microsecond', bucket_start, timestamptz 'epoch'),
			sum(batches), sum(episodes), sum(steps), sum(sum_return), sum(sum_abs_delta), sum(updates),
			sum(greedy_changes), sum(new_states), sum(new_pairs),
			(array_agg(backlog ORDER BY bucket_start) FILTER (WHERE backlog IS NOT NULL))[1], max(last_batch_at)
		FROM expired
		-- Rows too old for the window are not rolled up only to be dropped.
		WHERE bucket_start >= now() - $5::bigint * interval '1 microsecond'
		GROUP BY 3
		ON CONFLICT (policy_id, fine, bucket_start) DO UPDATE SET
			batches = h.batches + excluded.batches,
			` + historySums + `
			backlog = coalesce(h.backlog, excluded.backlog),
			last_batch_at = greatest(h.last_batch_at, excluded.last_batch_at)
	), pruned AS (
		DELETE FROM training_history
		WHERE policy_id = $1 AND NOT fine AND bucket_start < now() - $5::bigint * interval '1 microsecond'
	), bucket AS (
		SELECT date_bin($2::bigint * interval '1 microsecond', now(), timestamptz 'epoch') AS start
	)
	INSERT INTO training_history AS h (policy_id, fine, bucket_start, batches, episodes, steps, sum_return,
		sum_abs_delta, updates, greedy_changes, new_states, new_pairs, backlog, last_batch_at)
	SELECT $1, true, b.start, 1, $7, $8, $9, $10, $11, $12, $13, $14,
		-- A sample may have been rolled up into a coarse row meanwhile.
		CASE WHEN NOT EXISTS (SELECT 1 FROM training_history x WHERE x.policy_id = $1 AND x.fine IN (false, true)
		                      AND x.bucket_start > now() - $6::bigint * interval '1 microsecond' AND x.backlog IS NOT NULL)
		     THEN (SELECT count(*) FROM episodes e JOIN policies p USING (policy_id) WHERE e.policy_id = $1 AND ` + untrained + `)
		END,
		now()
	FROM bucket b
	ON CONFLICT (policy_id, fine, bucket_start) DO UPDATE SET
		batches = h.batches + 1,
		` + historySums + `
		-- A later batch of the bucket keeps the sample of an earlier one.
		backlog = coalesce(h.backlog, excluded.backlog),
		last_batch_at = excluded.last_batch_at`

func queueHistory(batch *pgx.Batch, policyID int32, h HistorySettings, s training.BatchSummary) {
	batch.Queue(historyWrite, policyID, h.FineBucket.Microseconds(), h.FineWindow.Microseconds(),
		h.Bucket.Microseconds(), h.Window.Microseconds(), h.backlogEvery().Microseconds(),
		s.Episodes, s.Steps, s.SumReturn, s.SumAbsDelta, s.Updates, s.GreedyChanges, s.NewStates, s.NewPairs)
}

// historyRead reads a policy's stored history rows that start within the
// last $2 microseconds, oldest first.
const historyRead = `
	SELECT fine, bucket_start, batches, episodes, steps, sum_return, sum_abs_delta, updates,
	       greedy_changes, new_states, new_pairs, backlog
	FROM training_history
	WHERE policy_id = $1 AND fine IN (false, true) AND bucket_start >= now() - $2::bigint * interval '1 microsecond'
	ORDER BY bucket_start, fine`

// PolicyReport reads what the status page shows of a policy, all from one
// snapshot so that the figures agree with each other: its status, its
// training history over the window, and the top states by drift and visits.
func (db *DB) PolicyReport(ctx context.Context, name string, window time.Duration, top int) (views.PolicyReport, error) {
	report := views.PolicyReport{Window: window}
	err := db.readSnapshot(ctx, func(tx pgx.Tx) error {
		st, err := scanStatus(tx.QueryRow(ctx, statusQuery+` WHERE p.name = $1`, name))
		if errors.Is(err, pgx.ErrNoRows) {
			return training.NotFoundf("no policy named %q", name)
		}
		if err != nil {
			return fmt.Errorf("policy status %q: %w", name, err)
		}
		report.Status = st
		// now() is the transaction's start: the clock every figure shares.
		if err = tx.QueryRow(ctx, `SELECT now()`).Scan(&report.Now); err != nil {
			return fmt.Errorf("read the clock: %w", err)
		}
		rows, err := tx.Query(ctx, historyRead, st.ID, window.Microseconds())
		if err != nil {
			return fmt.Errorf("read training history: %w", err)
		}
		var b training.HistoryBucket
		var fine bool
		_, err = pgx.ForEachRow(rows, []any{&fine, &b.Start, &b.Batches, &b.Episodes, &b.Steps, &b.SumReturn, &b.SumAbsDelta,
			&b.Updates, &b.GreedyChanges, &b.NewStates, &b.NewPairs, &b.Backlog}, func() error {
			b.Width = db.history.Bucket
			if fine {
				b.Width = db.history.FineBucket
			}
			if b.Backlog != nil {
				sample := *b.Backlog
				b.Backlog = &sample
			}
			report.Buckets = append(report.Buckets, b)
			return nil
		})
		if err != nil {
			return fmt.Errorf("read training history: %w", err)
		}
		if err = db.readChoicesAndEvents(ctx, tx, &report); err != nil {
			return err
		}
		drift, err := listStates(ctx, tx, st.Policy, views.StateQuery{Order: views.ByDrift, Limit: top})
		if err != nil {
			return err
		}
		visited, err := listStates(ctx, tx, st.Policy, views.StateQuery{Order: views.ByVisits, Limit: top})
		if err != nil {
			return err
		}
		report.MostDrift, report.MostVisited = drift.States, visited.States
		return nil
	})
	return report, err
}

// readSnapshot runs fn in a read-only transaction whose statements all see
// one snapshot.
func (db *DB) readSnapshot(ctx context.Context, fn func(pgx.Tx) error) error {
	tx, err := db.pool.BeginTx(ctx, pgx.TxOptions{IsoLevel: pgx.RepeatableRead, AccessMode: pgx.ReadOnly})
	if err != nil {
		return mapError(fmt.Errorf("begin: %w", err))
	}
	defer tx.Rollback(context.WithoutCancel(ctx)) //nolint:errcheck // read only: nothing to keep
	return mapError(fn(tx))
}
