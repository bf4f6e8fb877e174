package storage

import (
	"context"
	"fmt"
	"strconv"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgconn"

	"github.com/qtally/qtally/internal/access"
)

type execer interface {
	Exec(ctx context.Context, sql string, args ...any) (pgconn.CommandTag, error)
}

// insertAudit adds an entry to the audit log.
func insertAudit(ctx context.Context, q execer, e access.AuditEntry) error {
	names := e.PoliciesNamed
	if names == nil {
		names = []string{}
	}
	_, err := q.Exec(ctx, `
		INSERT INTO audit_log (via, token_id, token_label, method, route, path, policy, policies_named, object, status)
		VALUES ($1, $2, $3, $4, $5, $6, nullif($7, ''), $8, nullif($9, ''), $10)`,
		e.Via, e.TokenID, e.TokenLabel, e.Method, e.Route, access.TruncateAuditPath(e.Path), e.Policy, names, e.Object, e.Status)
	if err != nil {
		return mapError(fmt.Errorf("write audit entry: %w", err))
	}
	return nil
}

// RecordAudit adds an entry to the audit log.
func (db *DB) RecordAudit(ctx context.Context, e access.AuditEntry) error {
	return insertAudit(ctx, db.pool, e)
}

// commandLineAudit is the entry of a token command that succeeded.
func commandLineAudit(command string, tokenID int64, status int) access.AuditEntry {
	return access.AuditEntry{Via: access.AuditViaCommandLine, TokenLabel: "qtally token " + command,
		Method: "CLI", Route: "token " + command, Object: "token " + strconv.FormatInt(tokenID, 10), Status: status}
}

// AuditLog reads a page of the audit log, newest first.
func (db *DB) AuditLog(ctx context.Context, q access.AuditQuery) (access.AuditPage, error) {
	rows, err := db.pool.Query(ctx, `
		SELECT audit_id, at, via, token_id, token_label, method, route, path, coalesce(policy, ''), policies_named, coalesce(object, ''), status
		FROM audit_log
		WHERE ($1 = '' OR policy = $1) AND ($2 = 0 OR audit_id < $2)
		  AND ($3::text[] IS NULL OR (cardinality(policies_named) > 0 AND policies_named <@ $3))
		ORDER BY audit_id DESC LIMIT $4`, q.Policy, q.Before, q.Visible, q.Limit+1)
	if err != nil {
		return access.AuditPage{}, mapError(fmt.Errorf("read audit log: %w", err))
	}
	entries, err := pgx.CollectRows(rows, func(r pgx.CollectableRow) (access.AuditEntry, error) {
		var e access.AuditEntry
		scanErr := r.Scan(&e.ID, &e.At, &e.Via, &e.TokenID, &e.TokenLabel, &e.Method, &e.Route, &e.Path, &e.Policy, &e.PoliciesNamed, &e.Object, &e.Status)
		return e, scanErr
	})
	if err != nil {
		return access.AuditPage{}, mapError(fmt.Errorf("read audit log: %w", err))
	}
	page := access.AuditPage{Entries: entries}
	if len(entries) > q.Limit {
		page.Entries = entries[:q.Limit]
		next := page.Entries[q.Limit-1].ID
		page.NextBefore = &next
	}
	if page.Entries == nil {
		page.Entries = []access.AuditEntry{}
	}
	return page, nil
}
