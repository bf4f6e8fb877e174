// Package storage keeps qtally's data in PostgreSQL. All SQL lives here.
package storage

import (
	"context"
	"database/sql"
	"errors"
	"fmt"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgconn"
	"github.com/jackc/pgx/v5/pgxpool"
	"github.com/pressly/goose/v3"

	"github.com/qtally/qtally/training"
)

// Notification channels. Payloads are a policy id: hints to re-read, never data.
const (
	// ChannelEpisodes is notified when episodes of a policy are stored.
	ChannelEpisodes = "qtally_episodes"
	// ChannelPolicy is notified when a policy's settings or Q table change.
	ChannelPolicy = "qtally_policy"
)

// DB is qtally's PostgreSQL store.
type DB struct {
	pool     *pgxpool.Pool
	migrator *goose.Provider
	sqlDB    *sql.DB
	limits   training.Limits
	history  HistorySettings
	warm     *warmTables
	sizer    *training.BatchSizer
}

// Open connects to PostgreSQL. It does not apply migrations.
func Open(ctx context.Context, databaseURL string, maxConns int32, limits training.Limits) (*DB, error) {
	cfg, err := pgxConfig(databaseURL)
	if err != nil {
		return nil, err
	}
	if maxConns > 0 {
		cfg.MaxConns = maxConns
	}
	pool, err := pgxpool.NewWithConfig(ctx, cfg)
	if err != nil {
		return nil, fmt.Errorf("connect to PostgreSQL: %w", err)
	}
	migrator, sqlDB, err := newMigrator(databaseURL)
	if err != nil {
		pool.Close()
		return nil, err
	}
	return &DB{pool: pool, migrator: migrator, sqlDB: sqlDB, limits: limits, history: DefaultHistory(),
		warm: newWarmTables(DefaultWarmPairs)}, nil
}

// Close releases every connection.
func (db *DB) Close() {
	db.pool.Close()
	db.sqlDB.Close()
}

// Ready reports whether the database answers and has the current schema.
func (db *DB) Ready(ctx context.Context) error {
	if err := db.pool.Ping(ctx); err != nil {
		return mapError(fmt.Errorf("ping: %w", err))
	}
	pending, err := db.migrator.HasPending(ctx)
	if err != nil {
		return mapError(fmt.Errorf("schema version: %w", err))
	}
	if pending {
		return training.Unavailablef("the database schema is behind this binary: run qtally migrate")
	}
	return nil
}

// WithTx runs fn in a transaction, committing when fn returns nil.
func (db *DB) WithTx(ctx context.Context, fn func(pgx.Tx) error) error {
	tx, err := db.pool.Begin(ctx)
	if err != nil {
		return mapError(fmt.Errorf("begin: %w", err))
	}
	defer tx.Rollback(context.WithoutCancel(ctx)) //nolint:errcheck // after Commit it is a no-op
	if err := fn(tx); err != nil {
		return mapError(err)
	}
	if err := tx.Commit(ctx); err != nil {
		return mapError(fmt.Errorf("commit: %w", err))
	}
	return nil
}

// SQLSTATE codes the store reacts to.
const (
	uniqueViolation = "23505"
)

func isUniqueViolation(err error) bool {
	var pgErr *pgconn.PgError
	return errors.As(err, &pgErr) && pgErr.Code == uniqueViolation
}

// mapError turns connection-level failures into training.ErrUnavailable so
// that callers can answer 503 and retry; other errors pass unchanged.
func mapError(err error) error {
	if err == nil || errors.Is(err, training.ErrNotFound) || errors.Is(err, training.ErrConflict) ||
		errors.Is(err, training.ErrUnavailable) || errors.Is(err, context.Canceled) {
		return err
	}
	var verr *training.ValidationError
	if errors.As(err, &verr) {
		return err
	}
	var pgErr *pgconn.PgError
	if errors.As(err, &pgErr) {
		// Class 08 connection exceptions, 53 insufficient resources, 57P
		// operator intervention (shutdown): the database is going away.
		if c := pgErr.Code; len(c) >= 2 && (c[:2] == "08" || c[:2] == "53" || (len(c) >= 3 && c[:3] == "57P")) {
			return fmt.Errorf("%w: %w", training.ErrUnavailable, err)
		}
		return err
	}
	if pgconn.SafeToRetry(err) || pgconn.Timeout(err) || isConnectError(err) {
		return fmt.Errorf("%w: %w", training.ErrUnavailable, err)
	}
	return err
}

func isConnectError(err error) bool {
	var ce *pgconn.ConnectError
	return errors.As(err, &ce) || errors.Is(err, context.DeadlineExceeded)
}
