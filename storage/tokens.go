package storage

import (
	"context"
	"errors"
	"fmt"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/qtally/qtally/internal/access"
	"github.com/qtally/qtally/training"
)

// ChannelTokens is notified when a token is created or revoked, so that
// every API process reloads its keyring at once.
const ChannelTokens = "qtally_tokens"

const tokenColumns = `token_id, label, digest, scopes, coalesce(policies, '{}'),
	coalesce(rate_per_second, 0), coalesce(burst, 0), created_at, revoked_at`

func scanToken(row pgx.Row) (access.Token, error) {
	var t access.Token
	var scopes []string
	err := row.Scan(&t.ID, &t.Label, &t.Digest, &scopes, &t.Policies, &t.RatePerSecond, &t.Burst, &t.CreatedAt, &t.RevokedAt)
	t.Scopes = make([]access.Scope, len(scopes))
	for i, s := range scopes {
		t.Scopes[i] = access.Scope(s)
	}
	return t, err
}

func collectTokens(rows pgx.Rows, err error) ([]access.Token, error) {
	if err != nil {
		return nil, mapError(fmt.Errorf("read tokens: %w", err))
	}
	tokens, err := pgx.CollectRows(rows, func(r pgx.CollectableRow) (access.Token, error) { return scanToken(r) })
	if err != nil {
		return nil, mapError(fmt.Errorf("read tokens: %w", err))
	}
	return tokens, nil
}

// CreateToken stores a new token with the digest of its secret, and says
// so in the audit log.
func (db *DB) CreateToken(ctx context.Context, spec access.TokenSpec, digest []byte) (access.Token, error) {
	scopes := make([]string, len(spec.Scopes))
	for i, s := range spec.Scopes {
		scopes[i] = string(s)
	}
	var policies []string
	if len(spec.Policies) > 0 {
		policies = spec.Policies
	}
	var t access.Token
	err := db.WithTx(ctx, func(tx pgx.Tx) error {
		var err error
		t, err = scanToken(tx.QueryRow(ctx, `
			INSERT INTO api_tokens (label, digest, scopes, policies, rate_per_second, burst)
			VALUES ($1, $2, $3, $4, $5, $6)
			RETURNING `+tokenColumns,
			spec.Label, digest, scopes, policies, nullIfZero(spec.RatePerSecond), nullIfZero(float64(spec.Burst))))
		if err != nil {
			return fmt.Errorf("insert token: %w", err)
		}
		if err = insertAudit(ctx, tx, commandLineAudit("create", t.ID, 201)); err != nil {
			return err
		}
		_, err = tx.Exec(ctx, `SELECT pg_notify($1, $2::bigint::text)`, ChannelTokens, t.ID)
		return err
	})
	return t, err
}

// ListTokens reads every token, revoked ones too, oldest first.
func (db *DB) ListTokens(ctx context.Context) ([]access.Token, error) {
	return collectTokens(db.pool.Query(ctx, `SELECT `+tokenColumns+` FROM api_tokens ORDER BY token_id`))
}

// ActiveTokens reads every token not revoked.
func (db *DB) ActiveTokens(ctx context.Context) ([]access.Token, error) {
	return collectTokens(db.pool.Query(ctx, `SELECT `+tokenColumns+` FROM api_tokens WHERE revoked_at IS NULL`))
}

// RevokeToken marks a token revoked and returns when it was; revoking it
// again keeps the first time. Each revocation is written to the audit log.
func (db *DB) RevokeToken(ctx context.Context, id int64) (time.Time, error) {
	var at time.Time
	err := db.WithTx(ctx, func(tx pgx.Tx) error {
		err := tx.QueryRow(ctx, `UPDATE api_tokens SET revoked_at = coalesce(revoked_at, now())
			WHERE token_id = $1 RETURNING revoked_at`, id).Scan(&at)
		if errors.Is(err, pgx.ErrNoRows) {
			return training.NotFoundf("no token with id %d", id)
		}
		if err != nil {
			return fmt.Errorf("revoke token: %w", err)
		}
		if err = insertAudit(ctx, tx, commandLineAudit("revoke", id, 200)); err != nil {
			return err
		}
		_, err = tx.Exec(ctx, `SELECT pg_notify($1, $2::bigint::text)`, ChannelTokens, id)
		return err
	})
	return at, err
}
