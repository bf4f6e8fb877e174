package storage

import (
	"context"
	"errors"
	"fmt"
	"slices"

	"github.com/jackc/pgx/v5"

	"github.com/qtally/qtally/training"
)

const policyColumns = `policy_id, name, actions, gamma, alpha, epsilon, epsilon_min,
	coalesce(epsilon_decay_visits, 0), visit, initial_q, revision, created_at, updated_at, table_epoch,
	open_episode_idle_limit, on_idle, max_open_episodes, max_open_episode_steps`

func scanPolicy(row pgx.Row) (training.Policy, error) {
	var p training.Policy
	var visit, onIdle string
	err := row.Scan(&p.ID, &p.Name, &p.Actions, &p.Gamma, &p.Alpha, &p.Epsilon, &p.EpsilonMin,
		&p.EpsilonDecayVisits, &visit, &p.InitialQ, &p.Revision, &p.CreatedAt, &p.UpdatedAt, &p.TableEpoch,
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

// PutPolicy creates a policy or replaces its settings, reporting whether it
// created it. Changing the actions of a policy that has stored episodes or
// learned values is a conflict: stored indexes would point at other actions.
func (db *DB) PutPolicy(ctx context.Context, name string, s training.Settings) (training.Policy, bool, error) {
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
			if err := lockTraining(ctx, tx, id); err != nil {
				return err
			}
		case !errors.Is(err, pgx.ErrNoRows):
			return fmt.Errorf("read policy: %w", err)
		}
		existing, err := scanPolicy(tx.QueryRow(ctx, `SELECT `+policyColumns+` FROM policies WHERE name = $1 FOR UPDATE`, name))
		switch {
		case errors.Is(err, pgx.ErrNoRows):
			created = true
			p, err = scanPolicy(tx.QueryRow(ctx, `
				INSERT INTO policies (name, actions, gamma, alpha, epsilon, epsilon_min, epsilon_decay_visits, visit, initial_q,
					open_episode_idle_limit, on_idle, max_open_episodes, max_open_episode_steps)
				VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9, $10, $11, $12, $13)
				RETURNING `+policyColumns,
				name, s.Actions, s.Gamma, s.Alpha, s.Epsilon, s.EpsilonMin, nullIfZero(s.EpsilonDecayVisits), string(s.Visit), s.InitialQ,
				s.OpenEpisodeIdleLimit, idleRule(s.OnIdle), s.OpenEpisodeLimit(), s.OpenEpisodeStepLimit()))
			if err != nil {
				return fmt.Errorf("insert policy: %w", err)
			}
		case err != nil:
			return fmt.Errorf("read policy: %w", err)
		default:
			created = false
			if !slices.Equal(existing.Actions, s.Actions) {
				var used bool
				if err := tx.QueryRow(ctx, `SELECT EXISTS (SELECT 1 FROM episodes WHERE policy_id = $1)
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
					epsilon_decay_visits = $7, visit = $8, initial_q = $9, updated_at = now(),
					revision = revision + $10, table_epoch = table_epoch + $10,
					open_episode_idle_limit = $11, on_idle = $12, max_open_episodes = $13, max_open_episode_steps = $14
				WHERE policy_id = $1
				RETURNING `+policyColumns,
				existing.ID, s.Actions, s.Gamma, s.Alpha, s.Epsilon, s.EpsilonMin, nullIfZero(s.EpsilonDecayVisits), string(s.Visit), s.InitialQ, rewrite,
				s.OpenEpisodeIdleLimit, idleRule(s.OnIdle), s.OpenEpisodeLimit(), s.OpenEpisodeStepLimit()))
			if err != nil {
				return fmt.Errorf("update policy: %w", err)
			}
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
	       (SELECT count(*) FROM episodes e WHERE e.policy_id = p.policy_id AND e.trained_at IS NULL),
	       (SELECT min(received_at) FROM episodes e WHERE e.policy_id = p.policy_id AND e.trained_at IS NULL),
	       (SELECT count(DISTINCT state) FROM q_values q WHERE q.policy_id = p.policy_id),
	       (SELECT count(*) FROM q_values q WHERE q.policy_id = p.policy_id),
	       p.last_trained_at
	FROM policies p`

func scanStatus(row pgx.Row) (training.PolicyStatus, error) {
	var st training.PolicyStatus
	var visit, onIdle string
	p := &st.Policy
	err := row.Scan(&p.ID, &p.Name, &p.Actions, &p.Gamma, &p.Alpha, &p.Epsilon, &p.EpsilonMin,
		&p.EpsilonDecayVisits, &visit, &p.InitialQ, &p.Revision, &p.CreatedAt, &p.UpdatedAt, &p.TableEpoch,
		&p.OpenEpisodeIdleLimit, &onIdle, &p.MaxOpenEpisodes, &p.MaxOpenEpisodeSteps,
		&st.Episodes, &st.Backlog, &st.OldestUntrained, &st.States, &st.Pairs, &st.LastTrainedAt)
	p.Visit, p.OnIdle = training.VisitRule(visit), training.IdleRule(onIdle)
	return st, err
}

// PolicyStatus reads a policy with its episode and table counts.
func (db *DB) PolicyStatus(ctx context.Context, name string) (training.PolicyStatus, error) {
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
func (db *DB) ListPolicyStatus(ctx context.Context) ([]training.PolicyStatus, error) {
	rows, err := db.pool.Query(ctx, statusQuery+` ORDER BY p.name`)
	if err != nil {
		return nil, mapError(fmt.Errorf("list policies: %w", err))
	}
	out, err := pgx.CollectRows(rows, func(r pgx.CollectableRow) (training.PolicyStatus, error) { return scanStatus(r) })
	if err != nil {
		return nil, mapError(fmt.Errorf("list policies: %w", err))
	}
	return out, nil
}

// Backlogs reads every policy's untrained episode count and oldest arrival.
func (db *DB) Backlogs(ctx context.Context) ([]training.Backlog, error) {
	rows, err := db.pool.Query(ctx, `
		SELECT p.name, count(e.seq), min(e.received_at)
		FROM policies p LEFT JOIN episodes e ON e.policy_id = p.policy_id AND e.trained_at IS NULL
		GROUP BY p.name ORDER BY p.name`)
	if err != nil {
		return nil, mapError(fmt.Errorf("read backlog: %w", err))
	}
	out, err := pgx.CollectRows(rows, func(r pgx.CollectableRow) (training.Backlog, error) {
		var b training.Backlog
		err := r.Scan(&b.Policy, &b.Episodes, &b.OldestReceived)
		return b, err
	})
	if err != nil {
		return nil, mapError(fmt.Errorf("read backlog: %w", err))
	}
	return out, nil
}
