package storage

import (
	"context"
	"errors"
	"fmt"
	"math"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/qtally/qtally/training"
)

// trainingLockClass namespaces qtally's per-policy advisory locks
// (the two-key form: class, policy id).
const trainingLockClass = 0x71746c79

// TrainingLockClass is that class for those outside the package: holding
// pg_advisory_lock(TrainingLockClass, policy id) holds a policy's training
// (whole-system tests use it to stop training at a chosen point).
const TrainingLockClass = trainingLockClass

// TrainBatch implements training.BatchTrainer. One policy's batches are
// serialised by a transaction-level advisory lock, so several workers can
// share a database and spread over policies; a batch that fails or whose
// worker dies rolls back whole and is claimed again.
func (db *DB) TrainBatch(ctx context.Context, limits training.BatchLimits, learn func(training.BatchInput) training.BatchResult) (training.BatchReport, bool, error) {
	rows, err := db.pool.Query(ctx, `
		SELECT policy_id FROM policies p
		WHERE EXISTS (SELECT 1 FROM episodes e WHERE e.policy_id = p.policy_id AND `+untrained+`)
		ORDER BY random()`)
	if err != nil {
		return training.BatchReport{}, false, mapError(fmt.Errorf("find backlog: %w", err))
	}
	candidates, err := pgx.CollectRows(rows, pgx.RowTo[int32])
	if err != nil {
		return training.BatchReport{}, false, mapError(fmt.Errorf("find backlog: %w", err))
	}
	for _, id := range candidates {
		report, trained, err := db.trainPolicy(ctx, id, limits, learn)
		if err != nil || trained {
			return report, trained, err
		}
	}
	return training.BatchReport{}, false, nil
}

var errSkip = errors.New("policy busy or drained")

func (db *DB) trainPolicy(ctx context.Context, policyID int32, limits training.BatchLimits, learn func(training.BatchInput) training.BatchResult) (training.BatchReport, bool, error) {
	start := time.Now()
	if db.sizer != nil {
		limits.Episodes = db.sizer.Limit(policyID, limits.Episodes)
	}
	var report training.BatchReport
	var read, steps int
	var warm *warmTable
	var wrote warmVersion
	err := db.WithTx(ctx, func(tx pgx.Tx) error {
		var locked bool
		if err := tx.QueryRow(ctx, `SELECT pg_try_advisory_xact_lock($1, $2)`, trainingLockClass, policyID).Scan(&locked); err != nil {
			return fmt.Errorf("training lock: %w", err)
		}
		if !locked {
			return errSkip
		}
		p, err := scanPolicy(tx.QueryRow(ctx, `SELECT `+policyColumns+` FROM policies WHERE policy_id = $1`, policyID))
		if err != nil {
			return fmt.Errorf("read policy %d: %w", policyID, err)
		}
		through, err := trainedThrough(ctx, tx, policyID)
		if err != nil {
			return err
		}
		episodes, err := untrainedEpisodes(ctx, tx, policyID, through, limits)
		if err != nil {
			return err
		}
		if len(episodes) == 0 {
			return errSkip
		}
		read = len(episodes)
		for _, ep := range episodes {
			steps += len(ep.Actions)
		}
		// Estimates this process wrote and still current need no reading.
		warm = db.warm.take(policyID, versionOf(p))
		states := training.TouchedStates(episodes)
		if missing := warm.unknown(states); len(missing) > 0 {
			read, readErr := estimatesOfStates(ctx, tx, policyID, missing)
			if readErr != nil {
				return readErr
			}
			warm.learn(missing, read, len(p.Actions))
		}
		in := training.BatchInput{Policy: p, Episodes: episodes, Current: warm.current(states)}
		result := learn(in)
		last := episodes[len(episodes)-1].Seq
		revision, err := writeBatch(ctx, tx, policyID, last, last, result, db.history, training.SummarizeBatch(in, result))
		if err != nil {
			return err
		}
		warm.apply(result.Pairs)
		wrote = warmVersion{revision: revision, epoch: p.TableEpoch, updatedAt: p.UpdatedAt}
		report = training.BatchReport{PolicyID: policyID, PolicyName: p.Name, Revision: revision,
			Episodes: len(episodes), Result: result}
		return nil
	})
	if errors.Is(err, errSkip) {
		return report, false, nil
	}
	if err != nil {
		if db.sizer != nil {
			db.sizer.Failed(policyID, read, limits.Episodes)
		}
		return report, false, err
	}
	db.warm.put(policyID, warm, wrote)
	report.Duration = time.Since(start)
	if db.sizer != nil {
		db.sizer.Observe(policyID, report.Episodes, limits.Full(report.Episodes, steps), report.Duration)
	}
	return report, true, nil
}

// untrained is the SQL condition for episode e of policy p not being
// trained yet. The episode log is append-only: training advances its
// policy's watermark (policies.trained_through, the seq of the last episode
// it applied) in the batch's transaction instead of marking episodes. That
// is exact because a policy's episodes commit in seq order (Ingest) and are
// trained in seq order.
const untrained = `e.seq > p.trained_through`

// trainedThrough reads the seq of the last episode training applied to the
// policy (0: none).
func trainedThrough(ctx context.Context, tx pgx.Tx, policyID int32) (int64, error) {
	var seq int64
	if err := tx.QueryRow(ctx, `SELECT trained_through FROM policies WHERE policy_id = $1`, policyID).Scan(&seq); err != nil {
		return 0, fmt.Errorf("read training watermark: %w", err)
	}
	return seq, nil
}

// untrainedEpisodesQuery reads, in seq order, the episodes after seq $2 up
// to the $3rd, and none once those before it hold $4 steps. The batch's
// last seq is found once, from the seqs and step counts (a scalar
// subquery, not a join: over a backlog the statistics had not seen, the
// planner re-ran a joined range search once per backlog row, 27 s for one
// batch of a 50,000-episode backlog), and the rows are read by that range
// of the primary key: the ORDER BY makes it the cheapest index even when
// the planner believes the policy has one row, where the id index with the
// range as a filter tied with it and read the whole backlog. Asked for the
// wide rows with the limit itself, the planner could instead fetch every
// untrained row and sort them all (a 40 MB sort on disk for a
// 10,000-episode batch, on a fresh backlog with no statistics).
const untrainedEpisodesQuery = `
	SELECT seq, received_at, episode_id, states, actions, rewards, probabilities
	FROM episodes WHERE policy_id = $1 AND seq > $2 AND seq <= (
		SELECT max(seq) FROM (
			SELECT seq, sum(cardinality(actions)) OVER (ORDER BY seq) - cardinality(actions) AS steps_before
			FROM (SELECT seq, actions FROM episodes WHERE policy_id = $1 AND seq > $2 ORDER BY seq LIMIT $3) first) counted
		WHERE steps_before < $4)
	ORDER BY seq`

// untrainedEpisodes reads the episodes after seq after within limits: up to
// limits.Episodes of them, and no episode once those before it hold
// limits.Steps steps.
func untrainedEpisodes(ctx context.Context, tx pgx.Tx, policyID int32, after int64, limits training.BatchLimits) ([]training.StoredEpisode, error) {
	rows, err := tx.Query(ctx, untrainedEpisodesQuery, policyID, after, limits.Episodes, stepBound(limits))
	if err != nil {
		return nil, fmt.Errorf("read untrained episodes: %w", err)
	}
	var out []training.StoredEpisode
	var ep training.StoredEpisode
	_, err = pgx.ForEachRow(rows, []any{&ep.Seq, &ep.ReceivedAt, &ep.ID, &ep.States, &ep.Actions, &ep.Rewards, &ep.Probabilities}, func() error {
		out = append(out, ep)
		ep = training.StoredEpisode{}
		return nil
	})
	if err != nil {
		return nil, fmt.Errorf("read untrained episodes: %w", err)
	}
	return out, nil
}

// stepBound is limits.Steps as the read's bound: none when 0.
func stepBound(limits training.BatchLimits) int64 {
	if limits.Steps <= 0 {
		return math.MaxInt64
	}
	return int64(limits.Steps)
}

func estimatesOfStates(ctx context.Context, tx pgx.Tx, policyID int32, states []string) (map[training.PairKey]training.Estimate, error) {
	rows, err := tx.Query(ctx, `
		SELECT state, action, q, visits, last_delta FROM q_values
		WHERE policy_id = $1 AND state = ANY($2)`, policyID, states)
	if err != nil {
		return nil, fmt.Errorf("read estimates: %w", err)
	}
	current := make(map[training.PairKey]training.Estimate)
	var k training.PairKey
	var e training.Estimate
	_, err = pgx.ForEachRow(rows, []any{&k.State, &k.Action, &e.Q, &e.Visits, &e.LastDelta}, func() error {
		current[k] = e
		return nil
	})
	if err != nil {
		return nil, fmt.Errorf("read estimates: %w", err)
	}
	return current, nil
}

// changesKept is how many revisions of changed keys stay in q_changes: an
// API process further behind than that reloads its copy whole.
const changesKept = 1000

// lastSeq is the largest arrival number of the episodes (0 for none).
func lastSeq(episodes []training.StoredEpisode) int64 {
	var last int64
	for _, ep := range episodes {
		last = max(last, ep.Seq)
	}
	return last
}

// writeBatch writes every updated pair with one upsert, advances the
// policy's training watermark to trainedThrough and its table's training
// position to learnedThrough (each only if that is further: a replay moves
// the position over its source's episodes and leaves the watermark of the
// target's own alone), adds the batch to the training history and
// announces the new revision, in one round trip.
func writeBatch(ctx context.Context, tx pgx.Tx, policyID int32, trainedThrough, learnedThrough int64, res training.BatchResult,
	history HistorySettings, summary training.BatchSummary) (int64, error) {
	n := len(res.Pairs)
	states, actions := make([]string, n), make([]int16, n)
	qs, visits, deltas := make([]float64, n), make([]int64, n), make([]float64, n)
	for i, pr := range res.Pairs {
		states[i], actions[i], qs[i], visits[i], deltas[i] = pr.State, pr.Action, pr.Q, pr.Visits, pr.LastDelta
	}
	var revision int64
	batch := &pgx.Batch{}
	batch.Queue(`UPDATE policies SET revision = revision + 1, last_trained_at = now(),
		trained_through = greatest(trained_through, $2), trained_through_seq = greatest(trained_through_seq, $3)
		WHERE policy_id = $1 RETURNING revision`, policyID, trainedThrough, learnedThrough).
		QueryRow(func(row pgx.Row) error { return row.Scan(&revision) })
	// One statement records the changed keys for readers (q_changes) and
	// upserts the pairs, so the key arrays cross the wire once.
	batch.Queue(`
		WITH rev AS (SELECT revision FROM policies WHERE policy_id = $1),
		changes AS (
			INSERT INTO q_changes (policy_id, revision, states, actions, q, visits)
			SELECT $1, rev.revision, $2::text[], $3::int2[], $4::float8[], $5::int8[] FROM rev
		)
		INSERT INTO q_values (policy_id, state, action, q, visits, last_delta, updated_at, revision)
		SELECT $1, u.state, u.action, u.q, u.visits, u.last_delta, now(), rev.revision
		FROM unnest($2::text[], $3::int2[], $4::float8[], $5::int8[], $6::float8[])
		     AS u(state, action, q, visits, last_delta), rev
		ON CONFLICT (policy_id, state, action) DO UPDATE
		SET q = excluded.q, visits = excluded.visits, last_delta = excluded.last_delta,
		    updated_at = excluded.updated_at, revision = excluded.revision`,
		policyID, states, actions, qs, visits, deltas)
	batch.Queue(`DELETE FROM q_changes WHERE policy_id = $1
		AND revision <= (SELECT revision FROM policies WHERE policy_id = $1) - $2`, policyID, changesKept)
	queueHistory(batch, policyID, history, summary)
	batch.Queue(`SELECT pg_notify($1, $2::integer::text)`, ChannelPolicy, policyID)
	if err := tx.SendBatch(ctx, batch).Close(); err != nil {
		return 0, fmt.Errorf("write training batch: %w", err)
	}
	return revision, nil
}

// SetBatchSizer makes each policy's batches as large as s says, up to the
// maximum TrainBatch is given (nil: always up to that maximum). Call it
// before training.
func (db *DB) SetBatchSizer(s *training.BatchSizer) {
	db.sizer = s
}
