package storage

import (
	"context"
	"errors"
	"fmt"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/qtally/qtally/training"
)

// HistorySettings say how finely training history is kept and for how long.
type HistorySettings struct {
	// Bucket is the stretch of time one stored row sums up.
	Bucket time.Duration
	// Window is how long rows are kept; older ones are dropped by the
	// worker as it writes.
	Window time.Duration
}

// DefaultHistory keeps one row per policy and minute for two days: at most
// 2,880 small rows per policy.
func DefaultHistory() HistorySettings {
	return HistorySettings{Bucket: time.Minute, Window: 48 * time.Hour}
}

// Validate refuses settings that would keep nothing or split nothing.
func (h HistorySettings) Validate() error {
	if h.Bucket < time.Millisecond {
		return fmt.Errorf("the history bucket must be at least 1ms, got %v", h.Bucket)
	}
	if h.Window < 2*h.Bucket {
		return fmt.Errorf("the history window (%v) must be at least two buckets (%v)", h.Window, 2*h.Bucket)
	}
	return nil
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

// historyWrite adds a batch to its policy's current bucket and drops the
// policy's buckets that left the window, in one statement of the batch's
// transaction (the primary key makes both touch only a few rows). The
// backlog is counted by the first batch of each bucket only: counting costs
// time in proportion to the backlog, and a policy that is behind should not
// pay that on every batch. The statement must follow the one that advances
// the policy's training watermark, so that the count excludes the batch.
const historyWrite = `
	WITH pruned AS (
		DELETE FROM training_history
		WHERE policy_id = $1 AND bucket_start < now() - $3::bigint * interval '1 microsecond'
	), bucket AS (
		SELECT date_bin($2::bigint * interval '1 microsecond', now(), timestamptz 'epoch') AS start
	)
	INSERT INTO training_history AS h (policy_id, bucket_start, batches, episodes, steps, sum_return,
		sum_abs_delta, updates, greedy_changes, new_states, new_pairs, backlog, last_batch_at)
	SELECT $1, b.start, 1, $4, $5, $6, $7, $8, $9, $10, $11,
		CASE WHEN NOT EXISTS (SELECT 1 FROM training_history x WHERE x.policy_id = $1 AND x.bucket_start = b.start)
		     THEN (SELECT count(*) FROM episodes e JOIN policies p USING (policy_id) WHERE e.policy_id = $1 AND ` + untrained + `)
		     ELSE 0 END, -- never stored: a later batch of the bucket keeps the first one's count
		now()
	FROM bucket b
	ON CONFLICT (policy_id, bucket_start) DO UPDATE SET
		batches = h.batches + 1,
		episodes = h.episodes + excluded.episodes,
		steps = h.steps + excluded.steps,
		sum_return = h.sum_return + excluded.sum_return,
		sum_abs_delta = h.sum_abs_delta + excluded.sum_abs_delta,
		updates = h.updates + excluded.updates,
		greedy_changes = h.greedy_changes + excluded.greedy_changes,
		new_states = h.new_states + excluded.new_states,
		new_pairs = h.new_pairs + excluded.new_pairs,
		last_batch_at = excluded.last_batch_at`

func queueHistory(batch *pgx.Batch, policyID int32, h HistorySettings, s training.BatchSummary) {
	batch.Queue(historyWrite, policyID, h.Bucket.Microseconds(), h.Window.Microseconds(),
		s.Episodes, s.Steps, s.SumReturn, s.SumAbsDelta, s.Updates, s.GreedyChanges, s.NewStates, s.NewPairs)
}

// historyRead sums the stored buckets into points of $2 microseconds over
// the last $3 microseconds, and works the coverage at the end of each point
// back from today's counts ($4 states, $5 pairs) by taking off what later
// points added.
const historyRead = `
	WITH points AS (
		SELECT date_bin($2::bigint * interval '1 microsecond', bucket_start, timestamptz 'epoch') AS start,
		       sum(batches)::bigint AS batches, sum(episodes)::bigint AS episodes, sum(steps)::bigint AS steps,
		       sum(sum_return) AS sum_return, sum(sum_abs_delta) AS sum_abs_delta,
		       sum(updates)::bigint AS updates, sum(greedy_changes)::bigint AS greedy_changes,
		       sum(new_states)::bigint AS new_states, sum(new_pairs)::bigint AS new_pairs,
		       (array_agg(backlog ORDER BY bucket_start DESC))[1] AS backlog
		FROM training_history
		WHERE policy_id = $1 AND bucket_start >= now() - ($2::bigint + $3::bigint) * interval '1 microsecond'
		GROUP BY 1
	)
	SELECT start, batches, episodes, steps, sum_return, sum_abs_delta, updates, greedy_changes, backlog,
	       greatest($4::bigint - coalesce(sum(new_states) OVER later, 0), 0)::bigint,
	       greatest($5::bigint - coalesce(sum(new_pairs) OVER later, 0), 0)::bigint
	FROM points
	-- Only points that start within the window, so that none is drawn
	-- before it; the coverage needs only the points after each one.
	WHERE start >= now() - $3::bigint * interval '1 microsecond'
	WINDOW later AS (ORDER BY start DESC ROWS BETWEEN UNBOUNDED PRECEDING AND 1 PRECEDING)
	ORDER BY start`

// maxHistoryPoints bounds the points of a chart, whatever the window.
const maxHistoryPoints = 180

// PolicyReport reads what the status page shows of a policy, all from one
// snapshot so that the figures agree with each other: its status, its
// training history over the window, and the top states by drift and visits.
func (db *DB) PolicyReport(ctx context.Context, name string, window time.Duration, top int) (training.PolicyReport, error) {
	report := training.PolicyReport{Window: window, Step: training.HistoryStep(window, db.history.Bucket, maxHistoryPoints)}
	err := db.readSnapshot(ctx, func(tx pgx.Tx) error {
		st, err := scanStatus(tx.QueryRow(ctx, statusQuery+` WHERE p.name = $1`, name))
		if errors.Is(err, pgx.ErrNoRows) {
			return training.NotFoundf("no policy named %q", name)
		}
		if err != nil {
			return fmt.Errorf("policy status %q: %w", name, err)
		}
		report.Status = st
		rows, err := tx.Query(ctx, historyRead, st.ID, report.Step.Microseconds(), window.Microseconds(), st.States, st.Pairs)
		if err != nil {
			return fmt.Errorf("read training history: %w", err)
		}
		var pt training.HistoryPoint
		_, err = pgx.ForEachRow(rows, []any{&pt.Start, &pt.Batches, &pt.Episodes, &pt.Steps, &pt.SumReturn, &pt.SumAbsDelta,
			&pt.Updates, &pt.GreedyChanges, &pt.Backlog, &pt.States, &pt.Pairs}, func() error {
			report.History = append(report.History, pt)
			return nil
		})
		if err != nil {
			return fmt.Errorf("read training history: %w", err)
		}
		drift, err := listStates(ctx, tx, st.Policy, training.StateQuery{Order: training.ByDrift, Limit: top})
		if err != nil {
			return err
		}
		visited, err := listStates(ctx, tx, st.Policy, training.StateQuery{Order: training.ByVisits, Limit: top})
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
