package storage

import (
	"fmt"

	"github.com/jackc/pgx/v5/pgxpool"
)

func pgxConfig(databaseURL string) (*pgxpool.Config, error) {
	cfg, err := pgxpool.ParseConfig(databaseURL)
	if err != nil {
		// The parse error may echo the password; say only what is wrong.
		return nil, fmt.Errorf("DATABASE_URL is not a valid PostgreSQL connection string")
	}
	return cfg, nil
}
