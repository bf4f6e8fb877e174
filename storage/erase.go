package storage

import (
	"context"
	"errors"
	"fmt"

	"github.com/jackc/pgx/v5"

	"github.com/qtally/qtally/training"
)

// EraseEpisode deletes a policy's stored record of one episode. Learned
// values keep what the episode taught (a replay rebuilds a table without
// it); an episode not trained yet is never trained.
func (db *DB) EraseEpisode(ctx context.Context, policy, episodeID string) error {
	p, err := db.PolicyByName(ctx, policy)
	if err != nil {
		return err
	}
	tag, err := db.pool.Exec(ctx, `DELETE FROM episodes WHERE policy_id = $1 AND episode_id = $2`, p.ID, episodeID)
	if err != nil {
		return mapError(fmt.Errorf("erase episode: %w", err))
	}
	if tag.RowsAffected() == 0 {
		return training.NotFoundf("policy %q has no stored episode with id %q", policy, episodeID)
	}
	return nil
}

// DeletePolicy deletes a policy and every row of every table keyed by its
// policy_id (found in the catalogue, so that tables added later are
// covered), in one transaction. It waits for the policy's ingests (row
// lock) and its training batch (advisory lock) to finish, and notifies API
// processes so that they drop their copies.
func (db *DB) DeletePolicy(ctx context.Context, name string) error {
	return db.WithTx(ctx, func(tx pgx.Tx) error {
		var id int32
		err := tx.QueryRow(ctx, `SELECT policy_id FROM policies WHERE name = $1`, name).Scan(&id)
		if errors.Is(err, pgx.ErrNoRows) {
			return training.NotFoundf("no policy named %q", name)
		}
		if err != nil {
			return fmt.Errorf("read policy: %w", err)
		}
		// The training lock before the row lock, the order of a training
		// batch (it updates the row under the lock): the other order
		// deadlocks with a batch of the policy.
		if err = lockTraining(ctx, tx, id); err != nil {
			return err
		}
		err = tx.QueryRow(ctx, `SELECT policy_id FROM policies WHERE policy_id = $1 FOR UPDATE`, id).Scan(&id)
		if errors.Is(err, pgx.ErrNoRows) {
			return training.NotFoundf("no policy named %q", name)
		}
		if err != nil {
			return fmt.Errorf("read policy: %w", err)
		}
		rows, err := tx.Query(ctx, `
			SELECT c.table_name FROM information_schema.columns c
			JOIN information_schema.tables t ON t.table_schema = c.table_schema AND t.table_name = c.table_name
			WHERE c.table_schema = current_schema() AND c.column_name = 'policy_id'
			  AND t.table_type = 'BASE TABLE' AND c.table_name <> 'policies'
			ORDER BY c.table_name`)
		if err != nil {
			return fmt.Errorf("list policy tables: %w", err)
		}
		tables, err := pgx.CollectRows(rows, pgx.RowTo[string])
		if err != nil {
			return fmt.Errorf("list policy tables: %w", err)
		}
		for _, table := range tables {
			if _, err = tx.Exec(ctx, `DELETE FROM `+pgx.Identifier{table}.Sanitize()+` WHERE policy_id = $1`, id); err != nil {
				return fmt.Errorf("delete from %s: %w", table, err)
			}
		}
		if _, err = tx.Exec(ctx, `DELETE FROM policies WHERE policy_id = $1`, id); err != nil {
			return fmt.Errorf("delete policy: %w", err)
		}
		_, err = tx.Exec(ctx, `SELECT pg_notify($1, $2::integer::text)`, ChannelPolicy, id)
		return err
	})
}
