package storage

import (
	"context"
	"fmt"
	"strconv"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgconn"

	"github.com/qtally/qtally/training"
)

type execer interface {
	Exec(ctx context.Context, sql string, args ...any) (pgconn.CommandTag, error)
}

// insertAudit adds an entry to the audit log.
func insertAudit(ctx context.Context, q execer, e training.AuditEntry) error {
	names := e.PoliciesNamed
	if names == nil {
		names = []string{}
	}
	_, err := q.Exec(ctx, `
		INSERT INTO audit_log (via, token_id, token_label, method, route, path, policy, policies_named, object, status)
		VALUES ($1, $2, $3, $4, $5, $6, nullif($7, ''), $8, nullif($9, ''), $10)`,
		e.Via, e.TokenID, e.TokenLabel, e.Method, e.Route, training.TruncateAuditPath(e.Path), e.Policy, names, e.Object, e.Status)
	if err != nil {
		return mapError(fmt.Errorf("write audit entry: %w", err))
	}
	return nil
}

// RecordAudit adds an entry to the audit log.
func (db *DB) RecordAudit(ctx context.Context, e training.AuditEntry) error {
	return insertAudit(ctx, db.pool, e)
}

// commandLineAudit is the entry of a token command that succeeded.
func commandLineAudit(command string, tokenID int64, status int) training.AuditEntry {
	return training.AuditEntry{Via: training.AuditViaCommandLine, TokenLabel: "qtally token " + command,
		Method: "CLI", Route: "token " + command, Object: "token " + strconv.FormatInt(tokenID, 10), Status: status}
}

// AuditLog reads a page of the audit log, newest first.
func (db *DB) AuditLog(ctx context.Context, q training.AuditQuery) (training.AuditPage, error) {
	rows, err := db.pool.Query(ctx, `
		SELECT audit_id, at, via, token_id, token_label, method, route, path, coalesce(policy, ''), policies_named, coalesce(object, ''), status
		FROM audit_log
		WHERE ($1 = '' OR policy = $1) AND ($2 = 0 OR audit_id < $2)
		  AND ($3::text[] IS NULL OR (cardinality(policies_named) > 0 AND policies_named <@ $3))
		ORDER BY audit_id DESC LIMIT $4`, q.Policy, q.Before, q.Visible, q.Limit+1)
	if err != nil {
		return training.AuditPage{}, mapError(fmt.Errorf("read audit log: %w", err))
	}
	entries, err := pgx.CollectRows(rows, func(r pgx.CollectableRow) (training.AuditEntry, error) {
		var e training.AuditEntry
		scanErr := r.Scan(&e.ID, &e.At, &e.Via, &e.TokenID, &e.TokenLabel, &e.Method, &e.Route, &e.Path, &e.Policy, &e.PoliciesNamed, &e.Object, &e.Status)
		return e, scanErr
	})
	if err != nil {
		return training.AuditPage{}, mapError(fmt.Errorf("read audit log: %w", err))
	}
	page := training.AuditPage{Entries: entries}
	if len(entries) > q.Limit {
		page.Entries = entries[:q.Limit]
		next := page.Entries[q.Limit-1].ID
		page.NextBefore = &next
	}
	if page.Entries == nil {
		page.Entries = []training.AuditEntry{}
	}
	return page, nil
}
