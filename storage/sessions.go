package storage

import (
	"context"
	"errors"
	"fmt"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/qtally/qtally/training"
)

// CreateSession implements access.SessionStore.
func (db *DB) CreateSession(ctx context.Context, digest []byte, tokenID int64, expires time.Time) error {
	return db.WithTx(ctx, func(tx pgx.Tx) error {
		// Sign-ins are few and rate-limited: sweeping here keeps the table
		// to the sessions alive without a background job.
		if _, err := tx.Exec(ctx, `DELETE FROM page_sessions WHERE expires_at <= now()`); err != nil {
			return fmt.Errorf("drop expired sessions: %w", err)
		}
		if _, err := tx.Exec(ctx, `INSERT INTO page_sessions (session_digest, token_id, expires_at) VALUES ($1, $2, $3)`,
			digest, tokenID, expires); err != nil {
			return fmt.Errorf("store session: %w", err)
		}
		return nil
	})
}

// SessionTokenID implements access.SessionStore.
func (db *DB) SessionTokenID(ctx context.Context, digest []byte) (int64, error) {
	var id int64
	err := db.pool.QueryRow(ctx, `SELECT token_id FROM page_sessions WHERE session_digest = $1 AND expires_at > now()`, digest).Scan(&id)
	if errors.Is(err, pgx.ErrNoRows) {
		return 0, training.NotFoundf("no such session")
	}
	if err != nil {
		return 0, mapError(fmt.Errorf("read session: %w", err))
	}
	return id, nil
}

// DeleteSession implements access.SessionStore.
func (db *DB) DeleteSession(ctx context.Context, digest []byte) error {
	if _, err := db.pool.Exec(ctx, `DELETE FROM page_sessions WHERE session_digest = $1`, digest); err != nil {
		return mapError(fmt.Errorf("end session: %w", err))
	}
	return nil
}
