package storage

import (
	"context"
	"database/sql"
	"fmt"

	"github.com/jackc/pgx/v5/stdlib"
	"github.com/pressly/goose/v3"
	"github.com/pressly/goose/v3/lock"

	"github.com/qtally/qtally/migrations"
)

// newMigrator opens a goose Provider over the embedded migrations. Its
// session lock makes replicas that start together apply each migration once.
func newMigrator(databaseURL string) (*goose.Provider, *sql.DB, error) {
	cfg, err := pgxConfig(databaseURL)
	if err != nil {
		return nil, nil, err
	}
	db := stdlib.OpenDB(*cfg.ConnConfig)
	locker, err := lock.NewPostgresSessionLocker()
	if err != nil {
		db.Close()
		return nil, nil, fmt.Errorf("migration lock: %w", err)
	}
	provider, err := goose.NewProvider(goose.DialectPostgres, db, migrations.Files,
		goose.WithSessionLocker(locker))
	if err != nil {
		db.Close()
		return nil, nil, fmt.Errorf("migrations: %w", err)
	}
	return provider, db, nil
}

// Migrate applies every pending migration and returns how many it applied.
func Migrate(ctx context.Context, databaseURL string) (int, error) {
	provider, db, err := newMigrator(databaseURL)
	if err != nil {
		return 0, err
	}
	defer db.Close()
	results, err := provider.Up(ctx)
	if err != nil {
		return 0, fmt.Errorf("apply migrations: %w", err)
	}
	return len(results), nil
}

// SchemaCurrent reports whether the database has every migration applied.
func SchemaCurrent(ctx context.Context, databaseURL string) (bool, error) {
	provider, db, err := newMigrator(databaseURL)
	if err != nil {
		return false, err
	}
	defer db.Close()
	pending, err := provider.HasPending(ctx)
	if err != nil {
		return false, fmt.Errorf("check migrations: %w", err)
	}
	return !pending, nil
}
