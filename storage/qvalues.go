package storage

import (
	"context"
	"fmt"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/qtally/qtally/training"
)

// QRowsSince implements training.ReplicaSource.
func (db *DB) QRowsSince(ctx context.Context, policyID int32, after int64, fn func(training.QRow)) error {
	rows, err := db.pool.Query(ctx, `
		SELECT state, action, q, visits, revision FROM q_values
		WHERE policy_id = $1 AND revision > $2`, policyID, after)
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
func (db *DB) State(ctx context.Context, policy, state string) (training.StateView, error) {
	p, err := db.PolicyByName(ctx, policy)
	if err != nil {
		return training.StateView{}, err
	}
	rows, err := db.pool.Query(ctx, `
		SELECT action, q, visits, last_delta, updated_at FROM q_values
		WHERE policy_id = $1 AND state = $2`, p.ID, state)
	if err != nil {
		return training.StateView{}, mapError(fmt.Errorf("read state: %w", err))
	}
	stored := make(map[int16]training.ActionValue)
	var action int16
	var av training.ActionValue
	var updated time.Time
	_, err = pgx.ForEachRow(rows, []any{&action, &av.Q, &av.Visits, &av.LastDelta, &updated}, func() error {
		at := updated
		av.UpdatedAt = &at
		stored[action] = av
		return nil
	})
	if err != nil {
		return training.StateView{}, mapError(fmt.Errorf("read state: %w", err))
	}
	return training.NewStateView(p, state, stored), nil
}
