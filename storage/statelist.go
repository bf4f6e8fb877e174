package storage

import (
	"context"
	"fmt"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/qtally/qtally/internal/views"
	"github.com/qtally/qtally/training"
)

// stateOrders names, per order, the ranked column it sorts on (descending)
// and that column's SQL type. Ties go by state name, compared bytewise
// (COLLATE "C") so that the order is the same on every server.
var stateOrders = map[views.StateOrder]struct{ column, sqlType string }{
	views.ByVisits:  {"visits", "bigint"},
	views.ByDrift:   {"drift", "float8"},
	views.ByUpdated: {"updated", "timestamptz"},
}

// ListStates reads one page of a policy's states with their estimates.
func (db *DB) ListStates(ctx context.Context, policy string, q views.StateQuery) (views.StatePage, error) {
	p, err := db.PolicyByName(ctx, policy)
	if err != nil {
		return views.StatePage{}, err
	}
	page, err := listStates(ctx, db.pool, p, q)
	return page, mapError(err)
}

type querier interface {
	Query(ctx context.Context, sql string, args ...any) (pgx.Rows, error)
}

// listStates ranks the policy's states by their per-state figures, takes a
// page (one more than asked, to learn whether another follows) and joins
// back each state's pairs, in one statement. Ranking reads every pair of the
// policy: the cost of a page grows with the table.
func listStates(ctx context.Context, q querier, p training.Policy, query views.StateQuery) (views.StatePage, error) {
	order, ok := stateOrders[query.Order]
	if !ok {
		return views.StatePage{}, fmt.Errorf("list states: unknown order %q", query.Order)
	}
	col := order.column
	after := "true"
	args := []any{p.ID, query.Limit + 1}
	if k := query.After; k != nil {
		after = fmt.Sprintf(`%[1]s < $3::%[2]s OR (%[1]s = $3::%[2]s AND state COLLATE "C" > $4)`, col, order.sqlType)
		var v any
		switch query.Order {
		case views.ByVisits:
			v = k.Visits
		case views.ByDrift:
			v = k.Drift
		case views.ByUpdated:
			v = k.Updated
		}
		args = append(args, v, k.State)
	}
	rows, err := q.Query(ctx, `
		WITH ranked AS (
			SELECT state, sum(visits)::bigint AS visits, max(abs(last_delta)) AS drift, max(updated_at) AS updated
			FROM q_values WHERE policy_id = $1
			GROUP BY state
		), page AS (
			SELECT * FROM ranked WHERE `+after+` ORDER BY `+col+` DESC, state COLLATE "C" LIMIT $2
		)
		SELECT page.state, page.drift, page.updated, q.action, q.q, q.visits, q.last_delta, q.updated_at
		FROM page JOIN q_values q ON q.policy_id = $1 AND q.state = page.state
		ORDER BY page.`+col+` DESC, page.state COLLATE "C", q.action`, args...)
	if err != nil {
		return views.StatePage{}, fmt.Errorf("list states: %w", err)
	}
	// Rows arrive grouped by state, in listing order.
	type stateRows struct {
		state   string
		drift   float64
		updated time.Time
		stored  map[int16]views.ActionValue
	}
	var groups []stateRows
	var r stateRows
	var action int16
	var av views.ActionValue
	var pairUpdated time.Time
	_, err = pgx.ForEachRow(rows, []any{&r.state, &r.drift, &r.updated, &action, &av.Q, &av.Visits, &av.LastDelta, &pairUpdated}, func() error {
		if len(groups) == 0 || groups[len(groups)-1].state != r.state {
			r.stored = map[int16]views.ActionValue{}
			groups = append(groups, r)
		}
		at := pairUpdated
		av.UpdatedAt = &at
		groups[len(groups)-1].stored[action] = av
		return nil
	})
	if err != nil {
		return views.StatePage{}, fmt.Errorf("list states: %w", err)
	}
	var out views.StatePage
	for _, g := range groups {
		out.States = append(out.States, views.NewStateSummary(p, g.state, g.stored, g.drift, g.updated))
	}
	if len(out.States) > query.Limit {
		out.States = out.States[:query.Limit]
		next := out.States[query.Limit-1].Key(query.Order)
		out.Next = &next
	}
	return out, nil
}
