package storage

import (
	"context"
	"fmt"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/qtally/qtally/internal/views"
	"github.com/qtally/qtally/training"
)

// recordsReadUpTo is how many revisions behind a copy may be and still read
// the changed values from the change records, each of which repeats every
// pair its batch wrote; further behind, the changed keys are looked up in
// q_values once each.
const recordsReadUpTo = 4

// QRowsSince implements training.ReplicaSource. After 0 it reads the whole
// table; otherwise it reads the pairs that the batches after that revision
// changed, as q_changes lists them, or the whole table when q_changes no
// longer covers every revision since (a copy far behind, or a table
// rewrite): a superset is always a correct answer.
func (db *DB) QRowsSince(ctx context.Context, policyID int32, after int64, fn func(training.QRow)) error {
	whole, fromRecords := after == 0, false
	if !whole {
		var behind, recorded int64
		var allValues bool
		err := db.pool.QueryRow(ctx, `
			SELECT p.revision - $2, count(c.revision), coalesce(bool_and(c.q IS NOT NULL), true)
			FROM policies p LEFT JOIN q_changes c ON c.policy_id = p.policy_id AND c.revision > $2 AND c.revision <= p.revision
			WHERE p.policy_id = $1 GROUP BY p.revision`, policyID, after).Scan(&behind, &recorded, &allValues)
		if err != nil {
			return mapError(fmt.Errorf("read changed estimates: %w", err))
		}
		whole = behind != recorded
		fromRecords = !whole && allValues && behind <= recordsReadUpTo
	}
	query := `SELECT state, action, q, visits, revision FROM q_values WHERE policy_id = $1`
	args := []any{policyID}
	switch {
	case fromRecords:
		// Oldest first: a pair a later record changed again ends at its
		// later value.
		query = `
			SELECT u.state, u.action, u.q, u.visits, c.revision
			FROM q_changes c, unnest(c.states, c.actions, c.q, c.visits) AS u(state, action, q, visits)
			WHERE c.policy_id = $1 AND c.revision > $2
			ORDER BY c.revision`
		args = append(args, after)
	case !whole:
		query = `
			SELECT q.state, q.action, q.q, q.visits, q.revision
			FROM (SELECT DISTINCT u.state, u.action
			      FROM q_changes c, unnest(c.states, c.actions) AS u(state, action)
			      WHERE c.policy_id = $1 AND c.revision > $2) k
			JOIN q_values q ON q.policy_id = $1 AND q.state = k.state AND q.action = k.action`
		args = append(args, after)
	}
	rows, err := db.pool.Query(ctx, query, args...)
	if err != nil {
		return mapError(fmt.Errorf("read changed estimates: %w", err))
	}
	var r training.QRow
	_, err = pgx.ForEachRow(rows, []any{&r.State, &r.Action, &r.Q, &r.Visits, &r.Revision}, func() error {
		fn(r)
		return nil
	})
	if err != nil {
		return mapError(fmt.Errorf("read changed estimates: %w", err))
	}
	return nil
}

// State reads one state's estimates for every action of the policy.
func (db *DB) State(ctx context.Context, policy, state string) (views.StateView, error) {
	p, err := db.PolicyByName(ctx, policy)
	if err != nil {
		return views.StateView{}, err
	}
	rows, err := db.pool.Query(ctx, `
		SELECT action, q, visits, last_delta, updated_at FROM q_values
		WHERE policy_id = $1 AND state = $2`, p.ID, state)
	if err != nil {
		return views.StateView{}, mapError(fmt.Errorf("read state: %w", err))
	}
	stored := make(map[int16]views.ActionValue)
	var action int16
	var av views.ActionValue
	var updated time.Time
	_, err = pgx.ForEachRow(rows, []any{&action, &av.Q, &av.Visits, &av.LastDelta, &updated}, func() error {
		at := updated
		av.UpdatedAt = &at
		stored[action] = av
		return nil
	})
	if err != nil {
		return views.StateView{}, mapError(fmt.Errorf("read state: %w", err))
	}
	return views.NewStateView(p, state, stored), nil
}
