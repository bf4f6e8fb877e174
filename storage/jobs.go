package storage

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"slices"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/qtally/qtally/internal/jobs"
	"github.com/qtally/qtally/training"
)

// ChannelJobs is notified when a job is queued; the payload is its policy id.
const ChannelJobs = "qtally_jobs"

// resolveSpan turns a window into the sequence numbers it covers now, and
// counts its episodes and those carrying behaviour probabilities.
func resolveSpan(ctx context.Context, q pgx.Tx, policyID int32, w training.EpisodeWindow) (training.EpisodeSpan, int64, error) {
	span := training.EpisodeSpan{Since: w.Since, Until: w.Until}
	// after is the training position of the window's snapshot: its table
	// learned from no episode of a later seq.
	var after int64
	if w.AfterSnapshot != "" {
		err := q.QueryRow(ctx, `SELECT trained_through_seq FROM snapshots WHERE policy_id = $1 AND name = $2`, policyID, w.AfterSnapshot).Scan(&after)
		if errors.Is(err, pgx.ErrNoRows) {
			return span, 0, training.NotFoundf("window.after_snapshot: the policy has no snapshot named %q", w.AfterSnapshot)
		}
		if err != nil {
			return span, 0, fmt.Errorf("read snapshot: %w", err)
		}
	}
	var withProbabilities int64
	var row pgx.Row
	if w.Last > 0 {
		row = q.QueryRow(ctx, `
			SELECT coalesce(min(seq), 0), coalesce(max(seq), 0), count(*), count(*) FILTER (WHERE has_probabilities)
			FROM (SELECT seq, probabilities IS NOT NULL AS has_probabilities FROM episodes
			      WHERE policy_id = $1 AND seq > $3 ORDER BY seq DESC LIMIT $2) last`, policyID, w.Last, after)
	} else {
		row = q.QueryRow(ctx, `
			SELECT coalesce(min(seq), 0), coalesce(max(seq), 0), count(*), count(*) FILTER (WHERE probabilities IS NOT NULL)
			FROM episodes WHERE policy_id = $1 AND seq > $4
			  AND ($2::timestamptz IS NULL OR received_at >= $2) AND ($3::timestamptz IS NULL OR received_at < $3)`,
			policyID, w.Since, w.Until, after)
	}
	if err := row.Scan(&span.FirstSeq, &span.LastSeq, &span.Episodes, &withProbabilities); err != nil {
		return span, 0, fmt.Errorf("resolve episode window: %w", err)
	}
	if span.Episodes == 0 && w.AfterSnapshot != "" {
		return span, 0, training.Invalid(-1, -1, "window", "holds no stored episodes: none arrived after snapshot %q's table was trained", w.AfterSnapshot)
	}
	if span.Episodes == 0 {
		return span, 0, training.Invalid(-1, -1, "window", "holds no stored episodes")
	}
	return span, withProbabilities, nil
}

// replayedFromSeq is where the replays of a policy's episodes into another
// policy began, the smallest first seq of their windows; 0 when none did.
func replayedFromSeq(ctx context.Context, tx pgx.Tx, source, target int32) (int64, error) {
	var first int64
	err := tx.QueryRow(ctx, `
		SELECT coalesce(min((spec->'episodes'->>'first_seq')::bigint), 0) FROM jobs
		WHERE policy_id = $1 AND kind = 'replay' AND (spec->>'target_policy_id')::integer = $2`, source, target).Scan(&first)
	if err != nil {
		return 0, fmt.Errorf("read replays: %w", err)
	}
	return first, nil
}

// jobQuotaLockClass namespaces the per-policy lock of the open-jobs count.
const jobQuotaLockClass = 0x71746a71

// queueJob stores a job, within the policy's open-jobs quota, and wakes
// the runners. Callers hold the policy's pin lock from resolving the job's
// window to the commit, so that pruning either ran before the window was
// resolved or sees the job and keeps its episodes.
func (db *DB) queueJob(ctx context.Context, tx pgx.Tx, policyID int32, kind jobs.Kind, spec any) (int64, error) {
	// Serialised per policy, so that concurrent requests cannot pass the
	// count together.
	if _, err := tx.Exec(ctx, `SELECT pg_advisory_xact_lock($1, $2)`, jobQuotaLockClass, policyID); err != nil {
		return 0, fmt.Errorf("job quota lock: %w", err)
	}
	var open int
	if err := tx.QueryRow(ctx, `SELECT count(*) FROM jobs WHERE policy_id = $1 AND status IN ('queued', 'running')`, policyID).Scan(&open); err != nil {
		return 0, fmt.Errorf("count open jobs: %w", err)
	}
	if open >= db.limits.MaxOpenJobsPerPolicy {
		return 0, training.Quotaf("the policy has %d evaluations and replays queued or running, its limit (--max-open-jobs-per-policy %d); wait for one to finish", open, db.limits.MaxOpenJobsPerPolicy)
	}
	doc, err := json.Marshal(spec)
	if err != nil {
		return 0, fmt.Errorf("encode job: %w", err)
	}
	var id int64
	if err := tx.QueryRow(ctx, `INSERT INTO jobs (policy_id, kind, spec) VALUES ($1, $2, $3) RETURNING job_id`,
		policyID, string(kind), doc).Scan(&id); err != nil {
		return 0, fmt.Errorf("queue job: %w", err)
	}
	if _, err := tx.Exec(ctx, `SELECT pg_notify($1, $2::integer::text)`, ChannelJobs, policyID); err != nil {
		return 0, fmt.Errorf("notify: %w", err)
	}
	return id, nil
}

// QueueEvaluation checks an evaluation request against what is stored,
// resolves its window and queues it.
func (db *DB) QueueEvaluation(ctx context.Context, policy string, req training.EvaluationRequest) (jobs.View, error) {
	var id int64
	err := db.WithTx(ctx, func(tx pgx.Tx) error {
		p, err := scanPolicy(tx.QueryRow(ctx, `SELECT `+policyColumns+` FROM policies WHERE name = $1`, policy))
		if errors.Is(err, pgx.ErrNoRows) {
			return training.NotFoundf("no policy named %q", policy)
		}
		if err != nil {
			return fmt.Errorf("read policy: %w", err)
		}
		tp := p
		if name := string(req.Target.Policy); name != "" && name != policy {
			tp, err = scanPolicy(tx.QueryRow(ctx, `SELECT `+policyColumns+` FROM policies WHERE name = $1`, name))
			if errors.Is(err, pgx.ErrNoRows) {
				return training.NotFoundf("no target policy named %q", name)
			}
			if err != nil {
				return fmt.Errorf("read target policy: %w", err)
			}
		}
		h, err := readTableHeader(ctx, tx, tp, req.Target.Table)
		if err != nil {
			return err
		}
		if !slices.Equal(h.actions, p.Actions) {
			return training.Conflictf("the target table lists the actions %q, policy %q's episodes %q: a target must have the same actions in the same order", h.actions, p.Name, p.Actions)
		}
		if err = lockPins(ctx, tx, p.ID); err != nil {
			return err
		}
		span, usable, err := resolveSpan(ctx, tx, p.ID, req.Window)
		if err != nil {
			return err
		}
		if usable == 0 {
			return training.Invalid(-1, -1, "window", "none of its %d episodes carries behaviour probabilities, so none says anything about another policy; post steps with \"probability\" (the chance the behaviour gave the action taken)", span.Episodes)
		}
		job := training.EvaluationJob{Request: req, PolicyID: p.ID, TargetPolicyID: tp.ID, Episodes: span}
		if tp.ID != p.ID {
			if job.ReplayedFromSeq, err = replayedFromSeq(ctx, tx, p.ID, tp.ID); err != nil {
				return err
			}
		}
		id, err = db.queueJob(ctx, tx, p.ID, jobs.EvaluationKind, job)
		return err
	})
	if err != nil {
		return jobs.View{}, err
	}
	return db.Job(ctx, policy, jobs.EvaluationKind, id)
}

// QueueReplay creates the replay's target policy and queues the replay, in
// one transaction.
func (db *DB) QueueReplay(ctx context.Context, policy string, req training.ReplayRequest) (jobs.View, error) {
	var id int64
	err := db.WithTx(ctx, func(tx pgx.Tx) error {
		p, err := scanPolicy(tx.QueryRow(ctx, `SELECT `+policyColumns+` FROM policies WHERE name = $1 FOR KEY SHARE`, policy))
		if errors.Is(err, pgx.ErrNoRows) {
			return training.NotFoundf("no policy named %q", policy)
		}
		if err != nil {
			return fmt.Errorf("read policy: %w", err)
		}
		s, err := req.TargetSettings(p.Settings)
		if err != nil {
			return err
		}
		if err = lockPins(ctx, tx, p.ID); err != nil {
			return err
		}
		span, _, err := resolveSpan(ctx, tx, p.ID, req.Window)
		if err != nil {
			return err
		}
		if err = db.checkPolicyCount(ctx, tx); err != nil {
			return err
		}
		target, err := insertPolicy(ctx, tx, string(req.Target), s)
		targetID := target.ID
		if isUniqueViolation(err) {
			return training.Conflictf("a policy named %q exists already; a replay creates a new policy", req.Target)
		}
		if err != nil {
			return fmt.Errorf("create target policy: %w", err)
		}
		// No token made this policy, the replay did: the label says so.
		by := training.Actor{TokenLabel: fmt.Sprintf("replay of %s", policy)}
		if err = recordSettingsChange(ctx, tx, targetID, training.ChangeCreate, by, training.DiffSettings(nil, target.Settings)); err != nil {
			return err
		}
		id, err = db.queueJob(ctx, tx, p.ID, jobs.ReplayKind,
			training.ReplayJob{Request: req, PolicyID: p.ID, TargetPolicyID: targetID, Episodes: span})
		return err
	})
	if err != nil {
		return jobs.View{}, err
	}
	return db.Job(ctx, policy, jobs.ReplayKind, id)
}

// jobColumns are what scanJob reads, in its order.
const jobColumns = `job_id, kind, status, progress, spec->'request', spec->'episodes', result, error, created_at, started_at, finished_at`

// scanJob reads a row of jobColumns into a view of a job of the policy.
func scanJob(row pgx.Row, policy string) (jobs.View, error) {
	v := jobs.View{Policy: policy}
	var status, kindName string
	var progress, episodes []byte
	var errText *string
	if err := row.Scan(&v.ID, &kindName, &status, &progress, &v.Request, &episodes, &v.Result, &errText, &v.CreatedAt, &v.StartedAt, &v.FinishedAt); err != nil {
		return v, err
	}
	v.Kind, v.Status = jobs.Kind(kindName), jobs.Status(status)
	if errText != nil {
		v.Error = *errText
	}
	if err := json.Unmarshal(progress, &v.Progress); err != nil {
		return v, fmt.Errorf("decode job progress: %w", err)
	}
	if err := json.Unmarshal(episodes, &v.Episodes); err != nil {
		return v, fmt.Errorf("decode job window: %w", err)
	}
	return v, nil
}

// Job reads one of a policy's jobs of a kind.
func (db *DB) Job(ctx context.Context, policy string, kind jobs.Kind, id int64) (jobs.View, error) {
	p, err := db.PolicyByName(ctx, policy)
	if err != nil {
		return jobs.View{}, err
	}
	v, err := scanJob(db.pool.QueryRow(ctx, `SELECT `+jobColumns+` FROM jobs WHERE policy_id = $1 AND job_id = $2 AND kind = $3`,
		p.ID, id, string(kind)), p.Name)
	if errors.Is(err, pgx.ErrNoRows) {
		missing := &jobs.NotFoundError{Policy: p.Name, Kind: kind, ID: id}
		var other string
		err = db.pool.QueryRow(ctx, `SELECT kind FROM jobs WHERE policy_id = $1 AND job_id = $2`, p.ID, id).Scan(&other)
		if err != nil && !errors.Is(err, pgx.ErrNoRows) {
			return v, mapError(fmt.Errorf("read job: %w", err))
		}
		missing.OtherKind = jobs.Kind(other)
		return v, missing
	}
	if err != nil {
		return v, mapError(fmt.Errorf("read job: %w", err))
	}
	return v, nil
}

// ListJobs reads one page of a policy's jobs of a kind, newest first.
func (db *DB) ListJobs(ctx context.Context, policy string, kind jobs.Kind, q jobs.Query) (jobs.Page, error) {
	var page jobs.Page
	p, err := db.PolicyByName(ctx, policy)
	if err != nil {
		return page, err
	}
	// One more than a page says whether another page follows.
	rows, err := db.pool.Query(ctx, `
		SELECT `+jobColumns+` FROM jobs
		WHERE policy_id = $1 AND kind = $2 AND ($3 = 0 OR job_id < $3)
		ORDER BY job_id DESC LIMIT $4`, p.ID, string(kind), q.Before, q.Limit+1)
	if err != nil {
		return page, mapError(fmt.Errorf("list jobs: %w", err))
	}
	defer rows.Close()
	for rows.Next() {
		v, err := scanJob(rows, p.Name)
		if err != nil {
			return page, mapError(fmt.Errorf("list jobs: %w", err))
		}
		page.Jobs = append(page.Jobs, v)
	}
	if err := rows.Err(); err != nil {
		return page, mapError(fmt.Errorf("list jobs: %w", err))
	}
	if len(page.Jobs) > q.Limit {
		page.Jobs = page.Jobs[:q.Limit]
		page.Next = page.Jobs[q.Limit-1].ID
	}
	return page, nil
}

// ClaimJob implements jobs.Store.
func (db *DB) ClaimJob(ctx context.Context, staleAfter time.Duration, maxAttempts int) (jobs.Job, bool, error) {
	var job jobs.Job
	found := false
	err := db.WithTx(ctx, func(tx pgx.Tx) error {
		if _, err := tx.Exec(ctx, `
			UPDATE jobs SET status = 'failed', finished_at = now(),
			       error = format('the job was started %s times and its runner stopped each time; post it again', attempts)
			WHERE status = 'running' AND heartbeat_at < now() - make_interval(secs => $1) AND attempts >= $2`,
			staleAfter.Seconds(), maxAttempts); err != nil {
			return fmt.Errorf("fail abandoned jobs: %w", err)
		}
		var kind string
		err := tx.QueryRow(ctx, `
			UPDATE jobs j SET status = 'running', attempts = j.attempts + 1, progress = '{"phase": "starting", "done": 0, "total": 0}',
			       started_at = coalesce(j.started_at, now()), heartbeat_at = now()
			FROM (SELECT policy_id, job_id FROM jobs
			      WHERE status = 'queued' OR (status = 'running' AND heartbeat_at < now() - make_interval(secs => $1))
			      ORDER BY job_id LIMIT 1 FOR UPDATE SKIP LOCKED) next
			WHERE j.policy_id = next.policy_id AND j.job_id = next.job_id
			RETURNING j.job_id, j.policy_id, j.kind, j.spec, j.attempts`, staleAfter.Seconds()).
			Scan(&job.ID, &job.PolicyID, &kind, &job.Spec, &job.Attempts)
		if errors.Is(err, pgx.ErrNoRows) {
			return nil
		}
		if err != nil {
			return fmt.Errorf("claim job: %w", err)
		}
		job.Kind, found = jobs.Kind(kind), true
		return nil
	})
	return job, found, err
}

// ReportProgress implements jobs.Store. A runner whose job was
// claimed again by another (it looked dead) changes nothing.
func (db *DB) ReportProgress(ctx context.Context, job jobs.Job, p training.Progress) error {
	doc, err := json.Marshal(p)
	if err != nil {
		return fmt.Errorf("encode progress: %w", err)
	}
	_, err = db.pool.Exec(ctx, `UPDATE jobs SET progress = $3, heartbeat_at = now()
		WHERE policy_id = $1 AND job_id = $2 AND attempts = $4 AND status = 'running'`, job.PolicyID, job.ID, doc, job.Attempts)
	return mapError(err)
}

// FinishJob implements jobs.Store.
func (db *DB) FinishJob(ctx context.Context, job jobs.Job, p training.Progress, result any, failure string) error {
	progress, err := json.Marshal(p)
	if err != nil {
		return fmt.Errorf("encode progress: %w", err)
	}
	status, doc := jobs.Failed, []byte(nil)
	if failure == "" {
		status = jobs.Succeeded
		if doc, err = json.Marshal(result); err != nil {
			return fmt.Errorf("encode result: %w", err)
		}
	}
	_, err = db.pool.Exec(ctx, `UPDATE jobs SET status = $3, progress = $4, result = $5, error = nullif($6, ''), finished_at = now(), heartbeat_at = now()
		WHERE policy_id = $1 AND job_id = $2 AND attempts = $7 AND status = 'running'`,
		job.PolicyID, job.ID, string(status), progress, doc, failure, job.Attempts)
	return mapError(err)
}

// ReleaseJob implements jobs.Store; the claim does not count as an
// attempt.
func (db *DB) ReleaseJob(ctx context.Context, job jobs.Job) error {
	_, err := db.pool.Exec(ctx, `UPDATE jobs SET status = 'queued', attempts = attempts - 1, heartbeat_at = NULL
		WHERE policy_id = $1 AND job_id = $2 AND attempts = $3 AND status = 'running'`, job.PolicyID, job.ID, job.Attempts)
	if err == nil {
		_, err = db.pool.Exec(ctx, `SELECT pg_notify($1, $2::integer::text)`, ChannelJobs, job.PolicyID)
	}
	return mapError(err)
}

// readPage is how many episodes ReadEpisodes fetches at a time.
const readPage = 2000

// ReadEpisodes implements training.EpisodeReader. A cursor in one
// read-only transaction serves the pages: one ordered scan for the whole
// span whatever the table's statistics say (a fresh bulk load can make
// re-planned per-page queries sort the whole span for every page), one
// consistent view, and no result set open while fn runs.
func (db *DB) ReadEpisodes(ctx context.Context, policyID int32, span training.EpisodeSpan, fn func(training.StoredEpisode) error) error {
	return db.readTx(ctx, func(tx pgx.Tx) error {
		_, err := tx.Exec(ctx, `
			DECLARE window_episodes NO SCROLL CURSOR FOR
			SELECT seq, received_at, episode_id, states, actions, rewards, probabilities, allowed FROM episodes
			WHERE policy_id = $1 AND seq >= $2 AND seq <= $3
			  AND ($4::timestamptz IS NULL OR received_at >= $4) AND ($5::timestamptz IS NULL OR received_at < $5)
			ORDER BY seq`, policyID, span.FirstSeq, span.LastSeq, span.Since, span.Until)
		if err != nil {
			return fmt.Errorf("read episodes: %w", err)
		}
		for {
			rows, err := tx.Query(ctx, fmt.Sprintf(`FETCH %d FROM window_episodes`, readPage))
			if err != nil {
				return fmt.Errorf("read episodes: %w", err)
			}
			page, err := pgx.CollectRows(rows, func(r pgx.CollectableRow) (training.StoredEpisode, error) {
				var ep training.StoredEpisode
				scanErr := r.Scan(&ep.Seq, &ep.ReceivedAt, &ep.ID, &ep.States, &ep.Actions, &ep.Rewards, &ep.Probabilities, &ep.Allowed)
				return ep, scanErr
			})
			if err != nil {
				return fmt.Errorf("read episodes: %w", err)
			}
			for _, ep := range page {
				if err := fn(ep); err != nil {
					return err
				}
			}
			if len(page) < readPage {
				return nil
			}
		}
	})
}

// ClearTable implements training.ReplayStore.
func (db *DB) ClearTable(ctx context.Context, policyID int32) error {
	return db.WithTx(ctx, func(tx pgx.Tx) error {
		if err := lockTraining(ctx, tx, policyID); err != nil {
			return err
		}
		if _, _, _, err := replaceTable(ctx, tx, policyID, nil); err != nil {
			return err
		}
		return notifyPolicy(ctx, tx, policyID)
	})
}

// LearnBatch implements training.ReplayStore with the worker's own reads
// and writes; it waits for the policy's training lock rather than skipping.
func (db *DB) LearnBatch(ctx context.Context, policyID int32, episodes []training.StoredEpisode, learn func(training.BatchInput) training.BatchResult) (int64, training.BatchResult, error) {
	var revision int64
	var result training.BatchResult
	err := db.WithTx(ctx, func(tx pgx.Tx) error {
		if err := lockTraining(ctx, tx, policyID); err != nil {
			return err
		}
		p, err := scanPolicy(tx.QueryRow(ctx, `SELECT `+policyColumns+` FROM policies WHERE policy_id = $1`, policyID))
		if err != nil {
			return fmt.Errorf("read policy %d: %w", policyID, err)
		}
		touched := training.TouchedStates(episodes)
		current, err := estimatesOfStates(ctx, tx, policyID, touched)
		if err != nil {
			return err
		}
		// The target's table takes the source's states: they count towards
		// its own quota from now on (the source's quota bounded them).
		if _, _, err = recordStates(ctx, tx, policyID, touched); err != nil {
			return err
		}
		in := training.BatchInput{Policy: p, Episodes: episodes, Current: current}
		result = learn(in)
		// The episodes belong to the source: the target's training
		// watermark stays where it is, its table's position moves.
		revision, err = writeBatch(ctx, tx, policyID, 0, lastSeq(episodes), result, db.history, training.SummarizeBatch(in, result))
		return err
	})
	return revision, result, err
}
