package storage

import (
	"context"
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"strings"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgconn"

	"github.com/qtally/qtally/training"
)

// DecisionBatcher records the decisions of concurrent requests together:
// it gathers those that arrive while earlier commits are under way, commits
// each policy's together (the next steps of open episodes in one round
// trip, the rest in one more transaction), and only then lets each request
// answer. One durable commit costs about as much for a hundred rows as for
// one, so recording costs a request a share of a commit rather than a
// commit of its own.
type DecisionBatcher struct {
	db      *DB
	timeout time.Duration
	group   *groupCommitter[*pendingDecision]
	// Observe, when set, is told each committed batch's size and duration.
	Observe func(decisions int, took time.Duration)
}

type pendingDecision struct {
	d        training.Decision
	stored   training.Decision
	repeated bool
	err      error
	done     chan struct{}
	// answered: done was closed before the rest of its batch committed.
	answered bool
}

// NewDecisionBatcher returns a batcher committing as cfg says; Run must be
// running for Record to answer.
func (db *DB) NewDecisionBatcher(cfg GroupCommit) *DecisionBatcher {
	b := &DecisionBatcher{db: db, timeout: 10 * time.Second}
	b.group = newGroupCommitter(cfg, b.commit)
	return b
}

var errRecorderStopped = training.Unavailablef("this process is shutting down and records no more decisions; retry")

// Record implements training.DecisionRecorder: it returns once the
// decision (or the earlier one at its step) is committed.
func (b *DecisionBatcher) Record(ctx context.Context, d training.Decision) (training.Decision, bool, error) {
	p := &pendingDecision{d: d, done: make(chan struct{})}
	if err := b.group.await(ctx, p, p.done, errRecorderStopped); err != nil {
		return d, false, err
	}
	return p.stored, p.repeated, p.err
}

// Run gathers and commits batches until ctx ends (see groupCommitter.run).
func (b *DecisionBatcher) Run(ctx context.Context) error { return b.group.run(ctx) }

// commit records a batch, one transaction per policy (no transaction spans
// policies), and wakes every request of it.
func (b *DecisionBatcher) commit(ctx context.Context, batch []*pendingDecision) {
	start := time.Now()
	ctx, cancel := context.WithTimeout(context.WithoutCancel(ctx), b.timeout)
	defer cancel()
	byPolicy := map[int32][]*pendingDecision{}
	for _, p := range batch {
		byPolicy[p.d.PolicyID] = append(byPolicy[p.d.PolicyID], p)
	}
	done := make(chan struct{}, len(byPolicy))
	for id, group := range byPolicy {
		go func() {
			b.db.recordDecisions(ctx, id, group)
			done <- struct{}{}
		}()
	}
	for range byPolicy {
		<-done
	}
	if b.Observe != nil {
		b.Observe(len(batch), time.Since(start))
	}
	for _, p := range batch {
		if !p.answered {
			close(p.done)
		}
	}
}

type decisionOutcome struct {
	stored   training.Decision
	repeated bool
	err      error
}

// recordAttempts bounds how often one batch is recorded after collisions.
// A unique violation means another transaction committed a step of this
// batch meanwhile (the insert waits for it), so the next attempt reads that
// step as recorded; a batch of many openings can collide with several such
// transactions in turn, one each attempt, so once is not enough.
const recordAttempts = 8

// recordDecisions records one policy's decisions and sets each one's
// outcome. The next steps of open episodes, nearly every decision under a
// steady load, are stored in one round trip; the rest (openings, retries,
// refusals, and any next step the first attempt did not take) in one
// transaction that reads before it writes. A deadlock or a unique
// violation (another batch or process opened the same episode meanwhile)
// is retried.
func (db *DB) recordDecisions(ctx context.Context, policyID int32, group []*pendingDecision) {
	if next, others := splitNextSteps(group); len(next) > 0 {
		left, err := db.recordNextSteps(ctx, policyID, next)
		if err != nil {
			// Nothing of the attempt is stored: the whole group takes the
			// general path.
			left = next
		}
		group = append(others, left...)
		if len(group) == 0 {
			return
		}
	}
	outcomes, err := db.recordOnce(ctx, policyID, group)
	for attempt := 1; attempt < recordAttempts && (isUniqueViolation(err) || isDeadlock(err)); attempt++ {
		outcomes, err = db.recordOnce(ctx, policyID, group)
	}
	for i, p := range group {
		if err != nil {
			p.err = mapError(fmt.Errorf("record decisions: %w", err))
			continue
		}
		p.stored, p.repeated, p.err = outcomes[i].stored, outcomes[i].repeated, outcomes[i].err
	}
}

// splitNextSteps picks the decisions that may be next steps of open
// episodes: not step 0 (which opens an episode, or repeats its opening) and
// the only decision of its episode in the group.
func splitNextSteps(group []*pendingDecision) (next, others []*pendingDecision) {
	perEpisode := make(map[string]int, len(group))
	for _, p := range group {
		perEpisode[p.d.Episode]++
	}
	for _, p := range group {
		if p.d.Step > 0 && perEpisode[p.d.Episode] == 1 {
			next = append(next, p)
		} else {
			others = append(others, p)
		}
	}
	return next, others
}

// recordNextSteps stores, in one round trip (BEGIN, one statement, COMMIT
// pipelined), those decisions whose step is the next of an open episode
// within the policy's step limit, answers them, and returns the
// others untouched for the general path, which answers each with a repeat
// or a refusal. The episodes' rows are locked in one order, as the general
// path and ending lock them; a row changed meanwhile is checked again
// after the other transaction commits, so a step is taken once.
func (db *DB) recordNextSteps(ctx context.Context, policyID int32, next []*pendingDecision) ([]*pendingDecision, error) {
	now := time.Now()
	ds := make([]training.Decision, len(next))
	for i, p := range next {
		ds[i] = p.d
		ds[i].ChosenAt = now
	}
	stored := make(map[string]bool, len(next))
	err := db.WithConn(ctx, func(conn *pgx.Conn) error {
		var b pgx.Batch
		b.Queue(`BEGIN`)
		b.Queue(`
			WITH asked AS (`+decisionsFromArrays+`),
			locked AS (
				SELECT o.episode_id FROM open_episodes o JOIN asked a ON a.episode_id = o.episode_id
				WHERE o.policy_id = $1 AND o.steps = a.step
					AND a.step < (SELECT max_open_episode_steps FROM policies WHERE policy_id = $1)
				ORDER BY o.episode_id FOR UPDATE OF o),
			taken AS (
				UPDATE open_episodes o SET steps = o.steps + 1, last_active_at = now()
				FROM locked l WHERE o.policy_id = $1 AND o.episode_id = l.episode_id
				RETURNING o.episode_id)
			INSERT INTO open_episode_steps (policy_id, `+decisionColumns+`)
			SELECT $1, a.* FROM asked a JOIN taken USING (episode_id)
			RETURNING episode_id`, decisionArrays(policyID, ds)...).
			Query(func(rows pgx.Rows) error {
				var id string
				_, err := pgx.ForEachRow(rows, []any{&id}, func() error { stored[id] = true; return nil })
				return err
			})
		b.Queue(`COMMIT`)
		return conn.SendBatch(ctx, &b).Close()
	})
	if err != nil {
		return nil, fmt.Errorf("record next steps: %w", err)
	}
	var left []*pendingDecision
	for i, p := range next {
		if stored[p.d.Episode] {
			// Answered now, not when the rest of the batch is: that may
			// wait for the ingest lock (openings) or read more (retries).
			p.stored, p.answered = ds[i], true
			close(p.done)
		} else {
			left = append(left, p)
		}
	}
	return left, nil
}

// recordOnce runs recordInTx on a connection of its own; the transaction
// begins with the reads and commits with the writes, so it costs two
// round trips.
func (db *DB) recordOnce(ctx context.Context, policyID int32, group []*pendingDecision) ([]decisionOutcome, error) {
	var outcomes []decisionOutcome
	err := db.WithConn(ctx, func(conn *pgx.Conn) error {
		var err error
		outcomes, err = recordInTx(ctx, conn, policyID, group)
		return err
	})
	return outcomes, err
}

func isDeadlock(err error) bool {
	var pgErr *pgconn.PgError
	return errors.As(err, &pgErr) && pgErr.Code == "40P01"
}

type stepKey struct {
	episode string
	step    int
}

const decisionColumns = `episode_id, step, state, action, greedy_action, probability, allowed, mode,
	explored, known_state, revision, copy_age, chosen_at`

func scanDecision(row pgx.Row, policyID int32) (training.Decision, error) {
	d := training.Decision{PolicyID: policyID}
	var allowed []byte
	var mode string
	var copyAge float64
	err := row.Scan(&d.Episode, &d.Step, &d.State, &d.Action, &d.Greedy, &d.Probability, &allowed, &mode,
		&d.Explored, &d.KnownState, &d.Revision, &copyAge, &d.ChosenAt)
	d.Allowed, d.Mode, d.CopyAge = training.ActionSet(allowed), training.Mode(mode), time.Duration(copyAge*float64(time.Second))
	return d, err
}

// recordInTx decides every decision of the group against what is stored
// (new, a repeat of a stored step, or refused) and stores the new ones, in
// one transaction: BEGIN and the reads go in one pipelined round trip, the
// writes and COMMIT in another, however large the batch.
func recordInTx(ctx context.Context, conn *pgx.Conn, policyID int32, group []*pendingDecision) ([]decisionOutcome, error) {
	var ids []string
	seen := map[string]bool{}
	opening := false
	for _, p := range group {
		if !seen[p.d.Episode] {
			seen[p.d.Episode] = true
			ids = append(ids, p.d.Episode)
		}
		opening = opening || p.d.Step == 0
	}

	var reads pgx.Batch
	reads.Queue(`BEGIN`).Exec(func(pgconn.CommandTag) error { return nil })
	// Opening an episode takes the lock posting and ending take, shared:
	// openings run side by side, but never beside a post or an end, so an
	// id is either posted or kept open, never both. (Two batches opening
	// the same id collide on its key, and the later one is retried.)
	if opening {
		reads.Queue(`SELECT pg_advisory_xact_lock_shared($1, $2)`, ingestLockClass, policyID).Exec(func(pgconn.CommandTag) error { return nil })
	}
	var maxOpen, maxSteps int
	var name string
	reads.Queue(`SELECT name, max_open_episodes, max_open_episode_steps FROM policies WHERE policy_id = $1`, policyID).
		QueryRow(func(r pgx.Row) error { return r.Scan(&name, &maxOpen, &maxSteps) })
	// Locked in one order by every process, so that batches sharing
	// episodes do not deadlock.
	count := map[string]int{}
	reads.Queue(`SELECT episode_id, steps FROM open_episodes
		WHERE policy_id = $1 AND episode_id = ANY($2) ORDER BY episode_id FOR UPDATE`, policyID, ids).
		Query(func(rows pgx.Rows) error {
			var id string
			var n int
			_, err := pgx.ForEachRow(rows, []any{&id, &n}, func() error { count[id] = n; return nil })
			return err
		})
	// Whether an episode about to open was posted (or ended) before. Ids of
	// later steps that are not open are looked up below, only then: that
	// is a refusal anyway, and rare.
	finished := map[string]bool{}
	queueFinished := func(b *pgx.Batch, ids []string) {
		b.Queue(`SELECT episode_id FROM episodes WHERE policy_id = $1 AND episode_id = ANY($2)`, policyID, ids).
			Query(func(rows pgx.Rows) error {
				var id string
				_, err := pgx.ForEachRow(rows, []any{&id}, func() error { finished[id] = true; return nil })
				return err
			})
	}
	if opening {
		var openingIDs []string
		for _, p := range group {
			if p.d.Step == 0 {
				openingIDs = append(openingIDs, p.d.Episode)
			}
		}
		queueFinished(&reads, openingIDs)
	}
	var openNow int64
	if opening {
		reads.Queue(`SELECT coalesce(sum(open), 0)::bigint FROM open_episode_counts WHERE policy_id = $1`, policyID).
			QueryRow(func(r pgx.Row) error { return r.Scan(&openNow) })
	}
	if err := conn.SendBatch(ctx, &reads).Close(); err != nil {
		return nil, fmt.Errorf("read open episodes: %w", err)
	}
	// Retries (a step already recorded) and refusals need more; a batch of
	// next steps does not, and pays for none of it.
	var more pgx.Batch
	recorded := map[stepKey]training.Decision{}
	var retryEpisodes []string
	var retrySteps []int32
	var unknown []string
	for _, p := range group {
		c, isOpen := count[p.d.Episode]
		switch {
		case p.d.Step < c:
			retryEpisodes, retrySteps = append(retryEpisodes, p.d.Episode), append(retrySteps, int32(p.d.Step))
		case !isOpen && p.d.Step > 0:
			unknown = append(unknown, p.d.Episode)
		}
	}
	if len(retryEpisodes) > 0 {
		// LATERAL keeps this a key lookup per decision whatever plan the
		// prepared statement settles on.
		more.Queue(`SELECT s.* FROM unnest($2::text[], $3::integer[]) AS asked(episode_id, step)
			JOIN LATERAL (SELECT `+decisionColumns+` FROM open_episode_steps o
				WHERE o.policy_id = $1 AND o.episode_id = asked.episode_id AND o.step = asked.step) s ON true`,
			policyID, retryEpisodes, retrySteps).
			Query(func(rows pgx.Rows) error {
				list, err := pgx.CollectRows(rows, func(r pgx.CollectableRow) (training.Decision, error) { return scanDecision(r, policyID) })
				for _, d := range list {
					recorded[stepKey{d.Episode, d.Step}] = d
				}
				return err
			})
	}
	if len(unknown) > 0 {
		queueFinished(&more, unknown)
	}
	if more.Len() > 0 {
		if err := conn.SendBatch(ctx, &more).Close(); err != nil {
			return nil, fmt.Errorf("read recorded decisions: %w", err)
		}
	}

	now := time.Now()
	outcomes := make([]decisionOutcome, len(group))
	var fresh []training.Decision
	opened := 0
	for i, p := range group {
		d := p.d
		c, isOpen := count[d.Episode]
		switch {
		case finished[d.Episode]:
			outcomes[i].err = training.Conflictf("episode %q of policy %q is stored as a finished episode (it ended, or was posted): its id takes no more decisions; name a new episode", d.Episode, name)
		case d.Step < c:
			prev, ok := recorded[stepKey{d.Episode, d.Step}]
			if !ok {
				return nil, fmt.Errorf("decision %d of episode %q is counted but not stored", d.Step, d.Episode)
			}
			if prev.State != d.State {
				outcomes[i].err = training.Conflictf("step %d of episode %q was recorded in state %q; this request names state %q (the next step to record is %d)", d.Step, d.Episode, prev.State, d.State, c)
				break
			}
			outcomes[i] = decisionOutcome{stored: prev, repeated: true}
		case d.Step > c && !isOpen:
			outcomes[i].err = training.Conflictf("episode %q is not open, so this request must name step 0 to open it; it names step %d", d.Episode, d.Step)
		case d.Step > c:
			outcomes[i].err = training.Conflictf("episode %q has %d decisions recorded, so the next is step %d; this request names step %d", d.Episode, c, c, d.Step)
		case d.Step >= maxSteps:
			outcomes[i].err = training.Conflictf("episode %q has recorded %d decisions, the most policy %q keeps in one open episode (max_open_episode_steps); end it and open a new one", d.Episode, c, name)
		case !isOpen && openNow >= int64(maxOpen):
			outcomes[i].err = training.Conflictf("policy %q keeps %d episodes open, its limit (max_open_episodes); end some, or raise the limit", name, openNow)
		default:
			if !isOpen {
				openNow++
				opened++
			}
			d.ChosenAt = now
			count[d.Episode] = c + 1
			recorded[stepKey{d.Episode, d.Step}] = d
			fresh = append(fresh, d)
			outcomes[i] = decisionOutcome{stored: d}
		}
	}
	if len(fresh) == 0 {
		// Nothing to write: release the locks without a durable commit.
		if _, err := conn.Exec(ctx, `ROLLBACK`); err != nil {
			return nil, fmt.Errorf("end read-only batch: %w", err)
		}
		return outcomes, nil
	}

	var writes pgx.Batch
	queueDecisions(&writes, policyID, fresh)
	// The episodes that took a new step: their count and last activity.
	changed := map[string]bool{}
	for _, d := range fresh {
		changed[d.Episode] = true
	}
	var touched []string
	var steps []int32
	for _, id := range ids {
		if changed[id] {
			touched, steps = append(touched, id), append(steps, int32(count[id]))
		}
	}
	writes.Queue(`
		INSERT INTO open_episodes (policy_id, episode_id, steps)
		SELECT $1, e, n FROM unnest($2::text[], $3::integer[]) AS t(e, n)
		ON CONFLICT (policy_id, episode_id) DO UPDATE SET steps = excluded.steps, last_active_at = now()`,
		policyID, touched, steps)
	if opened > 0 {
		queueCounts(&writes, policyID, 1+rand.IntN(countShards-1), opened, 0, 0, 0)
	}
	writes.Queue(`COMMIT`)
	if err := conn.SendBatch(ctx, &writes).Close(); err != nil {
		return nil, fmt.Errorf("record decisions: %w", err)
	}
	return outcomes, nil
}

func queueDecisions(b *pgx.Batch, policyID int32, ds []training.Decision) {
	b.Queue(`INSERT INTO open_episode_steps (policy_id, `+decisionColumns+`) SELECT $1, * FROM (`+decisionsFromArrays+`) a`,
		decisionArrays(policyID, ds)...)
}

// decisionsFromArrays is a relation of decisions, in decisionColumns'
// order, from the arrays decisionArrays gives as $2 on ($1 is the policy).
const decisionsFromArrays = `SELECT * FROM unnest($2::text[], $3::integer[], $4::text[], $5::smallint[], $6::smallint[],
	$7::double precision[], $8::bytea[], $9::text[], $10::boolean[], $11::boolean[], $12::bigint[],
	$13::double precision[], $14::timestamptz[]) AS d(` + decisionColumns + `)`

// decisionArrays is the policy and one array per column of ds, the
// arguments of a statement using decisionsFromArrays.
func decisionArrays(policyID int32, ds []training.Decision) []any {
	n := len(ds)
	episodes, states, modes := make([]string, n), make([]string, n), make([]string, n)
	steps := make([]int32, n)
	actions, greedy := make([]int16, n), make([]int16, n)
	probs, ages := make([]float64, n), make([]float64, n)
	allowed := make([][]byte, n)
	explored, known := make([]bool, n), make([]bool, n)
	revisions := make([]int64, n)
	chosen := make([]time.Time, n)
	for i, d := range ds {
		episodes[i], steps[i], states[i], modes[i] = d.Episode, int32(d.Step), d.State, string(d.Mode)
		actions[i], greedy[i], probs[i], allowed[i] = d.Action, d.Greedy, d.Probability, d.Allowed
		explored[i], known[i], revisions[i], ages[i], chosen[i] = d.Explored, d.KnownState, d.Revision, d.CopyAge.Seconds(), d.ChosenAt
	}
	return []any{policyID, episodes, steps, states, actions, greedy, probs, allowed, modes, explored, known, revisions, ages, chosen}
}

// countShards is how many rows a policy's open-episode counts spread over:
// shard 0 for closings (which hold the ingest lock alone), the others
// drawn at random by batches opening episodes.
const countShards = 16

func queueCounts(b *pgx.Batch, policyID int32, shard, open, ended, endedIdle, dropped int) {
	b.Queue(`
		INSERT INTO open_episode_counts AS c (policy_id, shard, open, ended, ended_idle, dropped) VALUES ($1, $2, $3, $4, $5, $6)
		ON CONFLICT (policy_id, shard) DO UPDATE SET open = c.open + excluded.open, ended = c.ended + excluded.ended,
			ended_idle = c.ended_idle + excluded.ended_idle, dropped = c.dropped + excluded.dropped`,
		policyID, shard, open, ended, endedIdle, dropped)
}

func storedEpisodeIDs(ctx context.Context, tx pgx.Tx, policyID int32, ids []string) ([]string, error) {
	rows, err := tx.Query(ctx, `SELECT episode_id FROM episodes WHERE policy_id = $1 AND episode_id = ANY($2)`, policyID, ids)
	if err != nil {
		return nil, fmt.Errorf("look up episode ids: %w", err)
	}
	stored, err := pgx.CollectRows(rows, pgx.RowTo[string])
	if err != nil {
		return nil, fmt.Errorf("look up episode ids: %w", err)
	}
	return stored, nil
}

// openIDs lists which of ids are open episodes of the policy; with lock it
// locks them, waiting for decisions being recorded in them to commit.
func openIDs(ctx context.Context, tx pgx.Tx, policyID int32, ids []string, lock bool) ([]string, error) {
	query := `SELECT episode_id FROM open_episodes WHERE policy_id = $1 AND episode_id = ANY($2)`
	if lock {
		query += ` ORDER BY episode_id FOR UPDATE`
	}
	rows, err := tx.Query(ctx, query, policyID, ids)
	if err != nil {
		return nil, fmt.Errorf("look up open episodes: %w", err)
	}
	open, err := pgx.CollectRows(rows, pgx.RowTo[string])
	if err != nil {
		return nil, fmt.Errorf("look up open episodes: %w", err)
	}
	return open, nil
}

// notOpen explains why an episode is not open: stored as finished, or unknown.
func notOpen(ctx context.Context, tx pgx.Tx, p training.Policy, episode string) error {
	stored, err := storedEpisodeIDs(ctx, tx, p.ID, []string{episode})
	if err != nil {
		return err
	}
	if len(stored) > 0 {
		return training.Conflictf("episode %q of policy %q is not open: it is stored as a finished episode (it ended, or was posted)", episode, p.Name)
	}
	return training.NotFoundf("policy %q has no open episode %q", p.Name, episode)
}

// RewardBatcher adds the rewards of concurrent requests together, one
// transaction per policy: a reward addition one transaction each waited
// for a WAL flush apiece, and each held a share lock on its policy's row,
// whose many concurrent holders cost PostgreSQL a multixact each.
type RewardBatcher struct {
	*policyBatcher[training.RewardAddition, training.RewardResult]
}

type pendingReward = pendingOn[training.RewardAddition, training.RewardResult]

// NewRewardBatcher returns a batcher committing as cfg says; Run must be
// running for AddReward to answer.
func (db *DB) NewRewardBatcher(cfg GroupCommit) *RewardBatcher {
	return &RewardBatcher{newPolicyBatcher(cfg, errRewarderStopped, func(ctx context.Context, policy string, group []*pendingReward) error {
		return db.WithConn(ctx, func(conn *pgx.Conn) error { return addRewardsInTx(ctx, conn, policy, group) })
	})}
}

var errRewarderStopped = training.Unavailablef("this process is shutting down and adds no more rewards; retry")

// AddReward adds a reward to a decision of an open episode: the named
// step, or the latest. Several additions to one decision sum; a second
// addition with the same key adds nothing and answers what the first went
// to.
func (b *RewardBatcher) AddReward(ctx context.Context, policy, episode string, add training.RewardAddition) (training.RewardResult, error) {
	return b.submit(ctx, policy, episode, add)
}

type stepRef struct {
	episode string
	step    int32
}

// addRewardsInTx applies group's additions, all of one policy, in the
// order of group, and sets each one's result; an error returned fails the
// whole group. An addition refused on its own (an episode not open, a step
// not recorded, a sum out of bounds) gets its error and adds nothing. It
// takes two round trips: BEGIN with every read, then the writes with
// COMMIT.
func addRewardsInTx(ctx context.Context, conn *pgx.Conn, policy string, group []*pendingReward) error {
	seen := map[string]bool{}
	var ids, keyEpisodes, keys []string
	addEpisodes, addSteps := make([]string, len(group)), make([]*int32, len(group))
	for i, p := range group {
		if !seen[p.episode] {
			seen[p.episode] = true
			ids = append(ids, p.episode)
		}
		if p.req.Key != "" {
			keyEpisodes, keys = append(keyEpisodes, p.episode), append(keys, p.req.Key)
		}
		addEpisodes[i] = p.episode
		// A step past int32 reads as the latest; it is refused below as
		// not recorded.
		if p.req.Step != nil && *p.req.Step <= math.MaxInt32 {
			step := int32(*p.req.Step)
			addSteps[i] = &step
		}
	}
	var policyID int32
	found := false
	steps := map[string]int{}
	sums := map[stepRef]float64{}
	keyed := map[[2]string]int32{}
	finished := map[string]bool{}
	const policyOf = `(SELECT policy_id FROM policies WHERE name = $1)`
	var reads pgx.Batch
	reads.Queue(`BEGIN`)
	// KEY SHARE keeps the policy from being deleted under the batch.
	reads.Queue(`SELECT policy_id FROM policies WHERE name = $1 FOR KEY SHARE`, policy).
		QueryRow(func(r pgx.Row) error {
			err := r.Scan(&policyID)
			if errors.Is(err, pgx.ErrNoRows) {
				return nil
			}
			found = err == nil
			return err
		})
	// Locked in one order, as decisions and ends lock them; the reads
	// after it see what committed before the locks were granted.
	reads.Queue(`SELECT episode_id, steps FROM open_episodes
		WHERE policy_id = `+policyOf+` AND episode_id = ANY($2) ORDER BY episode_id FOR UPDATE`, policy, ids).
		Query(func(rows pgx.Rows) error {
			var id string
			var n int
			_, err := pgx.ForEachRow(rows, []any{&id, &n}, func() error { steps[id] = n; return nil })
			return err
		})
	// The rewards so far of only the decisions the additions name (the
	// latest, where they name none) and of those that keyed additions
	// went to before: an addition costs the same in a long episode as in
	// a short one.
	reads.Queue(`SELECT s.episode_id, s.step, s.reward FROM open_episode_steps s
		WHERE s.policy_id = `+policyOf+` AND (s.episode_id, s.step) IN (
			SELECT o.episode_id, coalesce(r.step, o.steps - 1) FROM unnest($2::text[], $3::integer[]) AS r(episode_id, step)
				JOIN open_episodes o ON o.policy_id = `+policyOf+` AND o.episode_id = r.episode_id
			UNION ALL
			SELECT k.episode_id, k.step FROM unnest($4::text[], $5::text[]) AS r(episode_id, key)
				JOIN open_episode_reward_keys k ON k.policy_id = `+policyOf+` AND k.episode_id = r.episode_id AND k.key = r.key)`,
		policy, addEpisodes, addSteps, keyEpisodes, keys).
		Query(func(rows pgx.Rows) error {
			var ref stepRef
			var reward float64
			_, err := pgx.ForEachRow(rows, []any{&ref.episode, &ref.step, &reward}, func() error { sums[ref] = reward; return nil })
			return err
		})
	if len(keys) > 0 {
		reads.Queue(`SELECT k.episode_id, k.key, k.step FROM unnest($2::text[], $3::text[]) AS r(episode_id, key)
			JOIN LATERAL (SELECT episode_id, key, step FROM open_episode_reward_keys o
				WHERE o.policy_id = `+policyOf+` AND o.episode_id = r.episode_id AND o.key = r.key) k ON true`, policy, keyEpisodes, keys).
			Query(func(rows pgx.Rows) error {
				var episode, key string
				var step int32
				_, err := pgx.ForEachRow(rows, []any{&episode, &key, &step}, func() error { keyed[[2]string{episode, key}] = step; return nil })
				return err
			})
	}
	reads.Queue(`SELECT episode_id FROM episodes WHERE policy_id = `+policyOf+` AND episode_id = ANY($2)`, policy, ids).
		Query(func(rows pgx.Rows) error {
			var episode string
			_, err := pgx.ForEachRow(rows, []any{&episode}, func() error { finished[episode] = true; return nil })
			return err
		})
	if err := conn.SendBatch(ctx, &reads).Close(); err != nil {
		return fmt.Errorf("read rewards: %w", err)
	}
	if !found {
		return training.NotFoundf("no policy named %q", policy)
	}

	changed := map[stepRef]bool{}
	var newKeyEpisodes, newKeys []string
	var newKeySteps []int32
	for _, p := range group {
		c, open := steps[p.episode]
		step := c - 1
		if p.req.Step != nil {
			step = *p.req.Step
		}
		switch {
		case !open && finished[p.episode]:
			p.err = training.Conflictf("episode %q of policy %q is not open: it is stored as a finished episode (it ended, or was posted)", p.episode, policy)
			continue
		case !open:
			p.err = training.NotFoundf("policy %q has no open episode %q", policy, p.episode)
			continue
		}
		if step >= c {
			p.err = training.Invalid(-1, -1, "step", "episode %q has %d decisions recorded (steps 0 to %d); there is no step %d", p.episode, c, c-1, step)
			continue
		}
		if k, used := keyed[[2]string{p.episode, p.req.Key}]; p.req.Key != "" && used {
			// Used before: answer what that addition went to.
			p.res = training.RewardResult{Step: int(k), Reward: sums[stepRef{p.episode, k}], Repeated: true}
			continue
		}
		ref := stepRef{p.episode, int32(step)}
		sum := sums[ref] + p.req.Reward
		if sum > training.MaxAbsReward || sum < -training.MaxAbsReward {
			p.err = training.Invalid(-1, -1, "reward", "step %d's rewards would sum to %g, larger in magnitude than the limit of %g", step, sum, training.MaxAbsReward)
			continue
		}
		sums[ref], changed[ref] = sum, true
		if p.req.Key != "" {
			keyed[[2]string{p.episode, p.req.Key}] = int32(step)
			newKeyEpisodes, newKeys, newKeySteps = append(newKeyEpisodes, p.episode), append(newKeys, p.req.Key), append(newKeySteps, int32(step))
		}
		p.res = training.RewardResult{Step: step, Reward: sum}
	}
	if len(changed) == 0 {
		// Nothing to write: release the locks without a durable commit.
		if _, err := conn.Exec(ctx, `ROLLBACK`); err != nil {
			return fmt.Errorf("end read-only batch: %w", err)
		}
		return nil
	}
	var episodes []string
	var stepNumbers []int32
	var rewards []float64
	for ref := range changed {
		episodes, stepNumbers, rewards = append(episodes, ref.episode), append(stepNumbers, ref.step), append(rewards, sums[ref])
	}
	var writes pgx.Batch
	writes.Queue(`UPDATE open_episode_steps o SET reward = r.reward
		FROM unnest($2::text[], $3::integer[], $4::double precision[]) AS r(episode_id, step, reward)
		WHERE o.policy_id = $1 AND o.episode_id = r.episode_id AND o.step = r.step`, policyID, episodes, stepNumbers, rewards)
	if len(newKeys) > 0 {
		writes.Queue(`INSERT INTO open_episode_reward_keys (policy_id, episode_id, key, step)
			SELECT $1, * FROM unnest($2::text[], $3::text[], $4::integer[])`, policyID, newKeyEpisodes, newKeys, newKeySteps)
	}
	writes.Queue(`UPDATE open_episodes SET last_active_at = now() WHERE policy_id = $1 AND episode_id = ANY($2)`, policyID, episodes)
	writes.Queue(`COMMIT`)
	if err := conn.SendBatch(ctx, &writes).Close(); err != nil {
		return fmt.Errorf("add rewards: %w", err)
	}
	return nil
}

// WithConn runs fn on a connection of its own, for work that pipelines its
// own BEGIN and COMMIT; a transaction fn leaves open (an error) is rolled
// back, or the connection dropped.
func (db *DB) WithConn(ctx context.Context, fn func(*pgx.Conn) error) error {
	conn, err := db.pool.Acquire(ctx)
	if err != nil {
		return mapError(fmt.Errorf("acquire a connection: %w", err))
	}
	defer conn.Release()
	err = fn(conn.Conn())
	if conn.Conn().PgConn().TxStatus() != 'I' {
		if _, rbErr := conn.Exec(context.WithoutCancel(ctx), `ROLLBACK`); rbErr != nil {
			_ = conn.Conn().Close(context.WithoutCancel(ctx))
		}
	}
	return mapError(err)
}

func policyInTx(ctx context.Context, tx pgx.Tx, name string) (training.Policy, error) {
	// KEY SHARE keeps the actions from changing under the transaction
	// without blocking the worker's revision updates.
	p, err := scanPolicy(tx.QueryRow(ctx, `SELECT `+policyColumns+` FROM policies WHERE name = $1 FOR KEY SHARE`, name))
	if errors.Is(err, pgx.ErrNoRows) {
		return p, training.NotFoundf("no policy named %q", name)
	}
	if err != nil {
		return p, fmt.Errorf("read policy: %w", err)
	}
	return p, nil
}

// How an open episode closed, for the counts.
type closing int

const (
	closedByClient closing = iota
	closedIdleEnded
	closedIdleDropped
)

// EndBatcher ends the open episodes of concurrent requests together: an
// end holds its policy's ingest lock exclusively until it commits (so that
// episodes take their training order in the order they end), so ends one
// transaction each would queue for that lock and a durable commit apiece.
type EndBatcher struct {
	*policyBatcher[training.EndRequest, training.EndResult]
}

type pendingEnd = pendingOn[training.EndRequest, training.EndResult]

// NewEndBatcher returns a batcher committing as cfg says; Run must be
// running for EndOpenEpisode to answer.
func (db *DB) NewEndBatcher(cfg GroupCommit) *EndBatcher {
	return &EndBatcher{newPolicyBatcher(cfg, errEnderStopped, func(ctx context.Context, policy string, group []*pendingEnd) error {
		return db.WithTx(ctx, func(tx pgx.Tx) error { return endInTx(ctx, tx, policy, group) })
	})}
}

var errEnderStopped = training.Unavailablef("this process is shutting down and ends no more episodes; retry")

// EndOpenEpisode ends an open episode (with an optional final reward added
// to its last step), or reports how it ended before.
func (b *EndBatcher) EndOpenEpisode(ctx context.Context, policy, episode string, req training.EndRequest) (training.EndResult, error) {
	return b.submit(ctx, policy, episode, req)
}

// endInTx ends the open episodes of group, all of one policy, in the order
// of group, and sets each request's result; an error returned fails the
// whole group (nothing of it is stored). A request refused on its own (a
// final reward out of bounds, an unknown episode) gets its error and
// leaves the others be.
func endInTx(ctx context.Context, tx pgx.Tx, policy string, group []*pendingEnd) error {
	var ids []string
	first := map[string]*pendingEnd{}
	for _, e := range group {
		e.res = training.EndResult{ID: e.episode}
		if first[e.episode] == nil {
			first[e.episode] = e
			ids = append(ids, e.episode)
		}
	}
	// One round trip for the policy, its ingest lock, the episodes' rows
	// (locked, in id order), their steps and the ids that ended before:
	// the lock is held from here to the commit, and ends of the policy
	// queue for it.
	var p training.Policy
	found := false
	isOpen := map[string]bool{}
	var records []training.EpisodeRecord
	endedBefore := map[string][]float64{}
	const policyID = `(SELECT policy_id FROM policies WHERE name = $1)`
	var reads pgx.Batch
	// KEY SHARE keeps the actions from changing under the transaction
	// without blocking the worker's revision updates.
	reads.Queue(`SELECT `+policyColumns+` FROM policies WHERE name = $1 FOR KEY SHARE`, policy).
		QueryRow(func(r pgx.Row) error {
			var err error
			p, err = scanPolicy(r)
			if errors.Is(err, pgx.ErrNoRows) {
				return nil
			}
			found = err == nil
			return err
		})
	reads.Queue(`SELECT pg_advisory_xact_lock($2, `+policyID+`)`, policy, ingestLockClass).Exec(func(pgconn.CommandTag) error { return nil })
	reads.Queue(`SELECT episode_id FROM open_episodes WHERE policy_id = `+policyID+` AND episode_id = ANY($2)
		ORDER BY episode_id FOR UPDATE`, policy, ids).
		Query(func(rows pgx.Rows) error {
			var id string
			_, err := pgx.ForEachRow(rows, []any{&id}, func() error { isOpen[id] = true; return nil })
			return err
		})
	reads.Queue(strings.Replace(openStepsQuery, "$1", policyID, 1), policy, ids).
		Query(func(rows pgx.Rows) error {
			var err error
			records, err = scanOpenEpisodeRecords(rows, ids)
			return err
		})
	reads.Queue(`SELECT episode_id, rewards FROM episodes WHERE policy_id = `+policyID+` AND episode_id = ANY($2)`, policy, ids).
		Query(func(rows pgx.Rows) error {
			var id string
			var rewards []float64
			_, err := pgx.ForEachRow(rows, []any{&id, &rewards}, func() error { endedBefore[id] = rewards; return nil })
			return err
		})
	if err := tx.SendBatch(ctx, &reads).Close(); err != nil {
		return fmt.Errorf("read open episodes: %w", err)
	}
	if !found {
		return training.NotFoundf("no policy named %q", policy)
	}
	var closing []string
	var kept []training.EpisodeRecord
	for _, r := range records {
		e := first[r.ID]
		if final := e.req.Reward; final != nil {
			last := r.Rewards[len(r.Rewards)-1] + *final
			if last > training.MaxAbsReward || last < -training.MaxAbsReward {
				e.err = training.Invalid(-1, -1, "reward", "the last step's rewards would sum to %g, larger in magnitude than the limit of %g", last, training.MaxAbsReward)
				continue
			}
			r.Rewards[len(r.Rewards)-1] = last
		}
		e.res.Steps, e.res.Return = len(r.States), sum(r.Rewards)
		closing, kept = append(closing, r.ID), append(kept, r)
	}
	if err := storeClosing(ctx, tx, p, closing, kept, closedByClient); err != nil {
		return err
	}
	for _, e := range group {
		if e.err != nil {
			continue
		}
		switch rewards, before := endedBefore[e.episode]; {
		case first[e.episode] != e && first[e.episode].err == nil:
			// The same end twice in one batch: the second is a retry.
			e.res = first[e.episode].res
			e.res.AlreadyEnded = true
		case first[e.episode] != e:
			e.err = first[e.episode].err
		case before:
			e.res.Steps, e.res.Return, e.res.AlreadyEnded = len(rewards), sum(rewards), true
		case !isOpen[e.episode]:
			e.err = training.NotFoundf("policy %q has no open episode %q", p.Name, e.episode)
		}
	}
	return nil
}

func sum(xs []float64) float64 {
	s := 0.0
	for _, x := range xs {
		s += x
	}
	return s
}

// closeOpenEpisodes ends or drops those of ids that are open, in the order
// of ids (the idle sweep's closing, with no final reward). The caller holds the
// policy's ingest lock, so that ended episodes take their arrival order
// (seq) in the order they end, exactly as posted ones do.
func closeOpenEpisodes(ctx context.Context, tx pgx.Tx, p training.Policy, ids []string, how closing) error {
	open, err := openIDs(ctx, tx, p.ID, ids, true)
	if err != nil || len(open) == 0 {
		return err
	}
	isOpen := map[string]bool{}
	for _, id := range open {
		isOpen[id] = true
	}
	var closing []string
	for _, id := range ids {
		if isOpen[id] {
			closing = append(closing, id)
		}
	}
	var records []training.EpisodeRecord
	if how != closedIdleDropped {
		if records, err = openEpisodeRecords(ctx, tx, p, closing); err != nil {
			return err
		}
	}
	return storeClosing(ctx, tx, p, closing, records, how)
}

// storeClosing stores records (the ended ones of ids, in order) as
// finished episodes and deletes every episode of ids from the open
// ones, counting them as how says. The caller holds the policy's ingest
// lock and the episodes' rows.
func storeClosing(ctx context.Context, tx pgx.Tx, p training.Policy, ids []string, records []training.EpisodeRecord, how closing) error {
	if len(ids) == 0 {
		return nil
	}
	if len(records) > 0 {
		_, err := tx.CopyFrom(ctx, pgx.Identifier{"episodes"},
			[]string{"policy_id", "episode_id", "states", "actions", "rewards", "probabilities", "allowed"},
			pgx.CopyFromSlice(len(records), func(i int) ([]any, error) {
				r := records[i]
				return []any{p.ID, r.ID, r.States, r.Actions, r.Rewards, r.Probabilities, r.Allowed}, nil
			}))
		if err != nil {
			return fmt.Errorf("store ended episodes: %w", err)
		}
	}
	// The rest in one round trip.
	var writes pgx.Batch
	if len(records) > 0 {
		writes.Queue(`SELECT pg_notify($1, $2::integer::text)`, ChannelEpisodes, p.ID)
	}
	for _, table := range []string{"open_episode_steps", "open_episode_reward_keys", "open_episodes"} {
		writes.Queue(`DELETE FROM `+table+` WHERE policy_id = $1 AND episode_id = ANY($2)`, p.ID, ids)
	}
	n := len(ids)
	switch how {
	case closedByClient:
		queueCounts(&writes, p.ID, 0, -n, n, 0, 0)
	case closedIdleEnded:
		queueCounts(&writes, p.ID, 0, -n, 0, n, 0)
	default:
		queueCounts(&writes, p.ID, 0, -n, 0, 0, n)
	}
	if err := tx.SendBatch(ctx, &writes).Close(); err != nil {
		return fmt.Errorf("close open episodes: %w", err)
	}
	return nil
}

// openEpisodeRecords reads open episodes in stored form, in the order of ids.
func openEpisodeRecords(ctx context.Context, tx pgx.Tx, p training.Policy, ids []string) ([]training.EpisodeRecord, error) {
	rows, err := tx.Query(ctx, openStepsQuery, p.ID, ids)
	if err != nil {
		return nil, fmt.Errorf("read open episodes: %w", err)
	}
	return scanOpenEpisodeRecords(rows, ids)
}

// openStepsQuery reads the steps of open episodes ($2) of a policy ($1),
// as scanOpenEpisodeRecords reads them.
const openStepsQuery = `SELECT episode_id, state, action, probability, allowed, reward FROM open_episode_steps
	WHERE policy_id = $1 AND episode_id = ANY($2) ORDER BY episode_id, step`

// scanOpenEpisodeRecords gathers the rows of openStepsQuery into records,
// in the order of ids (those with no steps left out).
func scanOpenEpisodeRecords(rows pgx.Rows, ids []string) ([]training.EpisodeRecord, error) {
	byID := map[string]*training.EpisodeRecord{}
	var id, state string
	var action int16
	var prob, reward float64
	var allowed []byte
	_, err := pgx.ForEachRow(rows, []any{&id, &state, &action, &prob, &allowed, &reward}, func() error {
		r := byID[id]
		if r == nil {
			r = &training.EpisodeRecord{ID: id}
			byID[id] = r
		}
		r.States = append(r.States, state)
		r.Actions = append(r.Actions, action)
		r.Probabilities = append(r.Probabilities, prob)
		r.Allowed = append(r.Allowed, allowed...)
		r.Rewards = append(r.Rewards, reward)
		return nil
	})
	if err != nil {
		return nil, fmt.Errorf("read open episodes: %w", err)
	}
	records := make([]training.EpisodeRecord, 0, len(ids))
	for _, id := range ids {
		if r := byID[id]; r != nil {
			records = append(records, *r)
		}
	}
	return records, nil
}

// OpenEpisode reads an open episode with its decisions.
func (db *DB) OpenEpisode(ctx context.Context, policy, episode string) (training.OpenEpisodeView, error) {
	v := training.OpenEpisodeView{ID: episode, Steps: []training.OpenStep{}}
	err := db.WithTx(ctx, func(tx pgx.Tx) error {
		p, err := policyInTx(ctx, tx, policy)
		if err != nil {
			return err
		}
		err = tx.QueryRow(ctx, `SELECT opened_at, last_active_at FROM open_episodes WHERE policy_id = $1 AND episode_id = $2`,
			p.ID, episode).Scan(&v.OpenedAt, &v.LastActiveAt)
		if errors.Is(err, pgx.ErrNoRows) {
			notOpenErr := notOpen(ctx, tx, p, episode)
			if errors.Is(notOpenErr, training.ErrConflict) {
				// Ended: no open episode by that id, and the answer says why.
				return training.NotFoundf("%s", notOpenErr.Error())
			}
			return notOpenErr
		}
		if err != nil {
			return fmt.Errorf("read open episode: %w", err)
		}
		rows, err := tx.Query(ctx, `SELECT `+decisionColumns+`, reward FROM open_episode_steps
			WHERE policy_id = $1 AND episode_id = $2 ORDER BY step`, p.ID, episode)
		if err != nil {
			return fmt.Errorf("read decisions: %w", err)
		}
		v.Steps, err = pgx.CollectRows(rows, func(r pgx.CollectableRow) (training.OpenStep, error) {
			d := training.Decision{}
			var allowed []byte
			var mode string
			var copyAge, reward float64
			scanErr := r.Scan(&d.Episode, &d.Step, &d.State, &d.Action, &d.Greedy, &d.Probability, &allowed, &mode,
				&d.Explored, &d.KnownState, &d.Revision, &copyAge, &d.ChosenAt, &reward)
			return training.OpenStep{Step: d.Step, State: d.State, Action: p.Actions[d.Action], Probability: d.Probability,
				Allowed: training.ActionSet(allowed).Names(p.Actions), Mode: training.Mode(mode), Revision: d.Revision,
				ChosenAt: d.ChosenAt, Reward: reward}, scanErr
		})
		if err != nil {
			return fmt.Errorf("read decisions: %w", err)
		}
		return nil
	})
	return v, err
}

// CloseIdleEpisodes ends or drops, as each policy says, up to perPolicy of
// its open episodes idle longer than its limit, the longest idle first.
func (db *DB) CloseIdleEpisodes(ctx context.Context, perPolicy int) ([]training.IdleSweep, error) {
	rows, err := db.pool.Query(ctx, `SELECT `+policyColumns+` FROM policies WHERE open_episode_idle_limit > 0 ORDER BY policy_id`)
	if err != nil {
		return nil, mapError(fmt.Errorf("read policies: %w", err))
	}
	policies, err := pgx.CollectRows(rows, func(r pgx.CollectableRow) (training.Policy, error) { return scanPolicy(r) })
	if err != nil {
		return nil, mapError(fmt.Errorf("read policies: %w", err))
	}
	var sweeps []training.IdleSweep
	for _, p := range policies {
		// Looked for first without the lock, which would hold up openings.
		var idle bool
		if err := db.pool.QueryRow(ctx, `SELECT EXISTS (SELECT 1 FROM open_episodes
			WHERE policy_id = $1 AND last_active_at < now() - make_interval(secs => $2))`, p.ID, p.OpenEpisodeIdleLimit).Scan(&idle); err != nil {
			return sweeps, mapError(fmt.Errorf("find idle episodes: %w", err))
		}
		if !idle {
			continue
		}
		sweep := training.IdleSweep{Policy: p.Name}
		err := db.WithTx(ctx, func(tx pgx.Tx) error {
			if _, err := tx.Exec(ctx, `SELECT pg_advisory_xact_lock($1, $2)`, ingestLockClass, p.ID); err != nil {
				return fmt.Errorf("ingest lock: %w", err)
			}
			rows, err := tx.Query(ctx, `SELECT episode_id FROM open_episodes
				WHERE policy_id = $1 AND last_active_at < now() - make_interval(secs => $2)
				ORDER BY last_active_at, episode_id LIMIT $3 FOR UPDATE SKIP LOCKED`, p.ID, p.OpenEpisodeIdleLimit, perPolicy)
			if err != nil {
				return fmt.Errorf("find idle episodes: %w", err)
			}
			ids, err := pgx.CollectRows(rows, pgx.RowTo[string])
			if err != nil || len(ids) == 0 {
				return err
			}
			how := closedIdleEnded
			if p.OnIdle == training.IdleDrop {
				how = closedIdleDropped
			}
			if err := closeOpenEpisodes(ctx, tx, p, ids, how); err != nil {
				return err
			}
			if how == closedIdleDropped {
				sweep.Dropped = len(ids)
			} else {
				sweep.Ended = len(ids)
			}
			return nil
		})
		if err != nil {
			return sweeps, err
		}
		if sweep.Ended+sweep.Dropped > 0 {
			sweeps = append(sweeps, sweep)
		}
	}
	return sweeps, nil
}

// OpenEpisodeFigures reads every policy's open-episode counts and ages.
func (db *DB) OpenEpisodeFigures(ctx context.Context) ([]training.OpenEpisodeFigures, error) {
	rows, err := db.pool.Query(ctx, openFiguresQuery+` ORDER BY p.name`)
	if err != nil {
		return nil, mapError(fmt.Errorf("read open episodes: %w", err))
	}
	out, err := pgx.CollectRows(rows, func(r pgx.CollectableRow) (training.OpenEpisodeFigures, error) { return scanOpenFigures(r) })
	if err != nil {
		return nil, mapError(fmt.Errorf("read open episodes: %w", err))
	}
	return out, nil
}

// PolicyOpenEpisodes reads one policy's open-episode counts and ages.
func (db *DB) PolicyOpenEpisodes(ctx context.Context, policy string) (training.OpenEpisodeFigures, error) {
	f, err := scanOpenFigures(db.pool.QueryRow(ctx, openFiguresQuery+` WHERE p.name = $1`, policy))
	if errors.Is(err, pgx.ErrNoRows) {
		return f, training.NotFoundf("no policy named %q", policy)
	}
	if err != nil {
		return f, mapError(fmt.Errorf("read open episodes: %w", err))
	}
	return f, nil
}

const openFiguresQuery = `
	SELECT p.name, coalesce(c.open, 0), coalesce(c.ended, 0), coalesce(c.ended_idle, 0), coalesce(c.dropped, 0),
		(SELECT min(o.opened_at) FROM open_episodes o WHERE o.policy_id = p.policy_id),
		(SELECT min(o.last_active_at) FROM open_episodes o WHERE o.policy_id = p.policy_id)
	FROM policies p LEFT JOIN LATERAL (
		SELECT sum(open)::bigint AS open, sum(ended)::bigint AS ended, sum(ended_idle)::bigint AS ended_idle, sum(dropped)::bigint AS dropped
		FROM open_episode_counts WHERE policy_id = p.policy_id) c ON true`

func scanOpenFigures(r pgx.Row) (training.OpenEpisodeFigures, error) {
	var f training.OpenEpisodeFigures
	err := r.Scan(&f.Policy, &f.Open, &f.Ended, &f.EndedIdle, &f.Dropped, &f.OldestOpenedAt, &f.LongestIdleSince)
	return f, err
}
