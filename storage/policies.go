package storage

import (
	"context"
	"errors"
	"fmt"
	"slices"

	"github.com/jackc/pgx/v5"

	"github.com/qtally/qtally/internal/views"
	"github.com/qtally/qtally/training"
)

const policyColumns = `policy_id, name, actions, gamma, alpha, epsilon, epsilon_min,
	coalesce(epsilon_decay_visits, 0), visit, initial_q, revision, created_at, updated_at, table_epoch, max_states, return_target,
	greedy_min_visits, greedy_untried, coalesce(greedy_fallback, ''), state_shape, require_probability,
	open_episode_idle_limit, on_idle, max_open_episodes, max_open_episode_steps`

func scanPolicy(row pgx.Row) (training.Policy, error) {
	var p training.Policy
	var visit, onIdle string
	err := row.Scan(&p.ID, &p.Name, &p.Actions, &p.Gamma, &p.Alpha, &p.Epsilon, &p.EpsilonMin,
		&p.EpsilonDecayVisits, &visit, &p.InitialQ, &p.Revision, &p.CreatedAt, &p.UpdatedAt, &p.TableEpoch, &p.MaxStates, &p.ReturnTarget,
		&p.GreedyMinVisits, &p.GreedyUntried, &p.GreedyFallback, &p.StateShape, &p.RequireProbability,
		&p.OpenEpisodeIdleLimit, &onIdle, &p.MaxOpenEpisodes, &p.MaxOpenEpisodeSteps)
	p.Visit = training.VisitRule(visit)
	p.OnIdle = training.IdleRule(onIdle)
	return p, err
}

// idleRule stores a rule left empty as the default, ending.
func idleRule(r training.IdleRule) string {
	if r == "" {
		return string(training.IdleEnd)
	}
	return string(r)
}

func nullIfZero(x float64) *float64 {
	if x == 0 {
		return nil
	}
	return &x
}

// PutPolicy creates a policy or replaces its settings without a
// precondition, reporting whether it created it.
func (db *DB) PutPolicy(ctx context.Context, name string, s training.Settings) (training.Policy, bool, error) {
	return db.ChangePolicy(ctx, name, training.SettingsChange{Replace: &s, Unconditional: true})
}

// ChangePolicy creates a policy or changes its settings as the change says,
// checking its precondition against the stored settings under a row lock and
// recording what changed in settings_changes, all in one transaction. It
// reports whether it created the policy. Changing the actions of a policy
// that has stored episodes or learned values is a conflict: stored indexes
// would point at other actions.
func (db *DB) ChangePolicy(ctx context.Context, name string, change training.SettingsChange) (training.Policy, bool, error) {
	var p training.Policy
	var created bool
	put := func(tx pgx.Tx) error {
		// A new initial value changes what the table means, so a settings
		// change waits for the policy's training lock (taken before the row
		// lock, in the order training takes them): no batch learns under
		// one initial value and writes under another.
		var id int32
		err := tx.QueryRow(ctx, `SELECT policy_id FROM policies WHERE name = $1`, name).Scan(&id)
		switch {
		case err == nil:
			if err = lockTraining(ctx, tx, id); err != nil {
				return err
			}
		case !errors.Is(err, pgx.ErrNoRows):
			return fmt.Errorf("read policy: %w", err)
		}
		var current *training.Policy
		existing, err := scanPolicy(tx.QueryRow(ctx, `SELECT `+policyColumns+` FROM policies WHERE name = $1 FOR UPDATE`, name))
		switch {
		case errors.Is(err, pgx.ErrNoRows):
		case err != nil:
			return fmt.Errorf("read policy: %w", err)
		default:
			current = &existing
		}
		s, kind, err := change.Resolve(name, current)
		if err != nil {
			return err
		}
		created = current == nil
		if created {
			if err = s.SetStateQuota(0, db.limits.MaxPairsPerPolicy); err != nil {
				return err
			}
			if err = db.checkPolicyCount(ctx, tx); err != nil {
				return err
			}
			if p, err = insertPolicy(ctx, tx, name, s); err != nil {
				return err
			}
		} else {
			quota := existing.MaxStates
			if !slices.Equal(existing.Actions, s.Actions) {
				quota = 0 // other actions: the bound on pairs applies anew
			}
			if err = s.SetStateQuota(quota, db.limits.MaxPairsPerPolicy); err != nil {
				return err
			}
			if !slices.Equal(existing.Actions, s.Actions) {
				var used bool
				if err = tx.QueryRow(ctx, `SELECT EXISTS (SELECT 1 FROM episodes WHERE policy_id = $1)
					OR EXISTS (SELECT 1 FROM q_values WHERE policy_id = $1)
					OR EXISTS (SELECT 1 FROM open_episodes WHERE policy_id = $1)`, existing.ID).Scan(&used); err != nil {
					return fmt.Errorf("check policy use: %w", err)
				}
				if used {
					return training.Conflictf("policy %q has stored or open episodes or learned values, so its actions cannot change (stored steps refer to actions by position); create a new policy instead", name)
				}
			}
			// Pairs never updated are worth the initial value, so a new one
			// (or new actions) is a new table: a new revision names it, and
			// a new epoch makes every in-memory copy reload it whole.
			rewrite := 0
			if existing.InitialQ != s.InitialQ || !slices.Equal(existing.Actions, s.Actions) {
				rewrite = 1
			}
			p, err = scanPolicy(tx.QueryRow(ctx, `
				UPDATE policies SET actions = $2, gamma = $3, alpha = $4, epsilon = $5, epsilon_min = $6,
					epsilon_decay_visits = $7, visit = $8, initial_q = $9, max_states = $11, return_target = $12,
					greedy_min_visits = $13, greedy_untried = $14, greedy_fallback = $15,
					state_shape = $16, require_probability = $17, updated_at = now(),
					revision = revision + $10, table_epoch = table_epoch + $10,
					open_episode_idle_limit = $18, on_idle = $19, max_open_episodes = $20, max_open_episode_steps = $21
				WHERE policy_id = $1
				RETURNING `+policyColumns,
				existing.ID, s.Actions, s.Gamma, s.Alpha, s.Epsilon, s.EpsilonMin, nullIfZero(s.EpsilonDecayVisits), string(s.Visit), s.InitialQ,
				rewrite, s.MaxStates, s.ReturnTarget,
				s.GreedyMinVisits, s.GreedyUntried, nullIfEmpty(s.GreedyFallback), s.StateShape, s.RequireProbability,
				s.OpenEpisodeIdleLimit, idleRule(s.OnIdle), s.OpenEpisodeLimit(), s.OpenEpisodeStepLimit()))
			if err != nil {
				return fmt.Errorf("update policy: %w", err)
			}
		}
		var old *training.Settings
		if current != nil {
			old = &current.Settings
		}
		// Diff what was stored, so that the history shows what the table
		// holds (a setting the schema drops would not be recorded as kept).
		if err = recordSettingsChange(ctx, tx, p.ID, kind, change.By, training.DiffSettings(old, p.Settings)); err != nil {
			return err
		}
		_, err = tx.Exec(ctx, `SELECT pg_notify($1, $2::integer::text)`, ChannelPolicy, p.ID)
		return err
	}
	err := db.WithTx(ctx, put)
	if isUniqueViolation(err) {
		// Another request created the same name meanwhile: now it is an update.
		err = db.WithTx(ctx, put)
	}
	return p, created, err
}

// insertPolicy creates a policy with its settings.
func insertPolicy(ctx context.Context, tx pgx.Tx, name string, s training.Settings) (training.Policy, error) {
	p, err := scanPolicy(tx.QueryRow(ctx, `
		INSERT INTO policies (name, actions, gamma, alpha, epsilon, epsilon_min, epsilon_decay_visits, visit, initial_q,
			greedy_min_visits, greedy_untried, greedy_fallback, state_shape, require_probability, max_states, return_target,
			open_episode_idle_limit, on_idle, max_open_episodes, max_open_episode_steps)
		VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9, $10, $11, $12, $13, $14, $15, $16, $17, $18, $19, $20)
		RETURNING `+policyColumns,
		name, s.Actions, s.Gamma, s.Alpha, s.Epsilon, s.EpsilonMin, nullIfZero(s.EpsilonDecayVisits), string(s.Visit), s.InitialQ,
		s.GreedyMinVisits, s.GreedyUntried, nullIfEmpty(s.GreedyFallback), s.StateShape, s.RequireProbability, s.MaxStates, s.ReturnTarget,
		s.OpenEpisodeIdleLimit, idleRule(s.OnIdle), s.OpenEpisodeLimit(), s.OpenEpisodeStepLimit()))
	if err != nil {
		return p, fmt.Errorf("insert policy: %w", err)
	}
	return p, nil
}

// recordSettingsChange adds a change to the policy's settings history,
// unless nothing changed.
func recordSettingsChange(ctx context.Context, tx pgx.Tx, policyID int32, kind training.ChangeKind, by training.Actor, diff []training.SettingDiff) error {
	if len(diff) == 0 {
		return nil
	}
	_, err := tx.Exec(ctx, `
		INSERT INTO settings_changes (policy_id, kind, token_id, token_label, fields)
		VALUES ($1, $2, $3, $4, $5)`,
		policyID, string(kind), by.TokenID, nullIfEmpty(by.TokenLabel), diff)
	if err != nil {
		return fmt.Errorf("record settings change: %w", err)
	}
	return nil
}

func nullIfEmpty(s string) *string {
	if s == "" {
		return nil
	}
	return &s
}

// SettingsHistory reads a page of a policy's settings changes, newest
// first, starting after the change with id before (0: from the newest).
func (db *DB) SettingsHistory(ctx context.Context, policy string, before int64, limit int) (training.SettingsHistoryPage, error) {
	var page training.SettingsHistoryPage
	p, err := db.PolicyByName(ctx, policy)
	if err != nil {
		return page, err
	}
	rows, err := db.pool.Query(ctx, `
		SELECT change_id, changed_at, kind, token_id, coalesce(token_label, ''), fields
		FROM settings_changes
		WHERE policy_id = $1 AND ($2 = 0 OR change_id < $2)
		ORDER BY change_id DESC LIMIT $3`, p.ID, before, limit+1)
	if err != nil {
		return page, mapError(fmt.Errorf("read settings history: %w", err))
	}
	page.Changes, err = pgx.CollectRows(rows, func(r pgx.CollectableRow) (training.SettingsChangeRecord, error) {
		var c training.SettingsChangeRecord
		var kind string
		scanErr := r.Scan(&c.ID, &c.ChangedAt, &kind, &c.TokenID, &c.TokenLabel, &c.Fields)
		c.Kind = training.ChangeKind(kind)
		return c, scanErr
	})
	if err != nil {
		return page, mapError(fmt.Errorf("read settings history: %w", err))
	}
	if len(page.Changes) > limit {
		page.Changes = page.Changes[:limit]
		page.Next = page.Changes[limit-1].ID
	}
	return page, nil
}

// PolicyByName reads one policy.
func (db *DB) PolicyByName(ctx context.Context, name string) (training.Policy, error) {
	p, err := scanPolicy(db.pool.QueryRow(ctx, `SELECT `+policyColumns+` FROM policies WHERE name = $1`, name))
	if errors.Is(err, pgx.ErrNoRows) {
		return p, training.NotFoundf("no policy named %q", name)
	}
	if err != nil {
		return p, mapError(fmt.Errorf("read policy %q: %w", name, err))
	}
	return p, nil
}

// PolicyByID reads one policy.
func (db *DB) PolicyByID(ctx context.Context, id int32) (training.Policy, error) {
	p, err := scanPolicy(db.pool.QueryRow(ctx, `SELECT `+policyColumns+` FROM policies WHERE policy_id = $1`, id))
	if errors.Is(err, pgx.ErrNoRows) {
		return p, training.NotFoundf("no policy with id %d", id)
	}
	if err != nil {
		return p, mapError(fmt.Errorf("read policy %d: %w", id, err))
	}
	return p, nil
}

// ListPolicies reads every policy, ordered by name.
func (db *DB) ListPolicies(ctx context.Context) ([]training.Policy, error) {
	rows, err := db.pool.Query(ctx, `SELECT `+policyColumns+` FROM policies ORDER BY name`)
	if err != nil {
		return nil, mapError(fmt.Errorf("list policies: %w", err))
	}
	policies, err := pgx.CollectRows(rows, func(r pgx.CollectableRow) (training.Policy, error) { return scanPolicy(r) })
	if err != nil {
		return nil, mapError(fmt.Errorf("list policies: %w", err))
	}
	return policies, nil
}

// statusQuery reads a policy and its counts in one statement, so that they
// come from one snapshot (a revision never disagrees with the backlog).
const statusQuery = `
	SELECT ` + policyColumns + `,
	       (SELECT count(*) FROM episodes e WHERE e.policy_id = p.policy_id),
	       (SELECT count(*) FROM episodes e WHERE e.policy_id = p.policy_id AND ` + untrained + `),
	       (SELECT min(received_at) FROM episodes e WHERE e.policy_id = p.policy_id AND ` + untrained + `),
	       (SELECT count(DISTINCT state) FROM q_values q WHERE q.policy_id = p.policy_id),
	       (SELECT count(*) FROM q_values q WHERE q.policy_id = p.policy_id),
	       p.last_trained_at
	FROM policies p`

func scanStatus(row pgx.Row) (views.PolicyStatus, error) {
	var st views.PolicyStatus
	var visit, onIdle string
	p := &st.Policy
	err := row.Scan(&p.ID, &p.Name, &p.Actions, &p.Gamma, &p.Alpha, &p.Epsilon, &p.EpsilonMin,
		&p.EpsilonDecayVisits, &visit, &p.InitialQ, &p.Revision, &p.CreatedAt, &p.UpdatedAt, &p.TableEpoch, &p.MaxStates, &p.ReturnTarget,
		&p.GreedyMinVisits, &p.GreedyUntried, &p.GreedyFallback, &p.StateShape, &p.RequireProbability,
		&p.OpenEpisodeIdleLimit, &onIdle, &p.MaxOpenEpisodes, &p.MaxOpenEpisodeSteps,
		&st.Episodes, &st.Backlog, &st.OldestUntrained, &st.States, &st.Pairs, &st.LastTrainedAt)
	p.Visit, p.OnIdle = training.VisitRule(visit), training.IdleRule(onIdle)
	return st, err
}

// PolicyStatus reads a policy with its episode and table counts.
func (db *DB) PolicyStatus(ctx context.Context, name string) (views.PolicyStatus, error) {
	st, err := scanStatus(db.pool.QueryRow(ctx, statusQuery+` WHERE p.name = $1`, name))
	if errors.Is(err, pgx.ErrNoRows) {
		return st, training.NotFoundf("no policy named %q", name)
	}
	if err != nil {
		return st, mapError(fmt.Errorf("policy status %q: %w", name, err))
	}
	return st, nil
}

// ListPolicyStatus reads every policy with its counts.
func (db *DB) ListPolicyStatus(ctx context.Context) ([]views.PolicyStatus, error) {
	rows, err := db.pool.Query(ctx, statusQuery+` ORDER BY p.name`)
	if err != nil {
		return nil, mapError(fmt.Errorf("list policies: %w", err))
	}
	out, err := pgx.CollectRows(rows, func(r pgx.CollectableRow) (views.PolicyStatus, error) { return scanStatus(r) })
	if err != nil {
		return nil, mapError(fmt.Errorf("list policies: %w", err))
	}
	return out, nil
}

// backlogsQuery counts each policy's episodes past its watermark by a
// range of the primary key; a join of the two tables read every stored
// episode, trained ones included, at every metrics scrape.
const backlogsQuery = `
	SELECT p.name, b.episodes, b.oldest
	FROM policies p CROSS JOIN LATERAL (
		SELECT count(*) AS episodes, min(e.received_at) AS oldest
		FROM episodes e WHERE e.policy_id = p.policy_id AND ` + untrained + `) b
	ORDER BY p.name`

// Backlogs reads every policy's untrained episode count and oldest arrival.
func (db *DB) Backlogs(ctx context.Context) ([]views.Backlog, error) {
	rows, err := db.pool.Query(ctx, backlogsQuery)
	if err != nil {
		return nil, mapError(fmt.Errorf("read backlog: %w", err))
	}
	out, err := pgx.CollectRows(rows, func(r pgx.CollectableRow) (views.Backlog, error) {
		var b views.Backlog
		scanErr := r.Scan(&b.Policy, &b.Episodes, &b.OldestReceived)
		return b, scanErr
	})
	if err != nil {
		return nil, mapError(fmt.Errorf("read backlog: %w", err))
	}
	return out, nil
}

// policyCountLock serialises policy creation, so that concurrent creations
// cannot pass the count together.
const policyCountLock = 0x71746c70

// checkPolicyCount refuses a new policy when the service holds its limit.
func (db *DB) checkPolicyCount(ctx context.Context, tx pgx.Tx) error {
	if _, err := tx.Exec(ctx, `SELECT pg_advisory_xact_lock($1)`, policyCountLock); err != nil {
		return fmt.Errorf("policy count lock: %w", err)
	}
	var n int
	if err := tx.QueryRow(ctx, `SELECT count(*) FROM policies`).Scan(&n); err != nil {
		return fmt.Errorf("count policies: %w", err)
	}
	if n >= db.limits.MaxPolicies {
		return training.Quotaf("this service holds %d policies, its limit (--max-policies %d); no policy was created", n, db.limits.MaxPolicies)
	}
	return nil
}
