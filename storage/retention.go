package storage

import (
	"context"
	"fmt"
	"time"

	"github.com/jackc/pgx/v5"
)

// pinLockClass namespaces the per-policy advisory lock that serialises
// queueing a job with pruning the policy's episodes, so that pruning sees
// every job whose window was resolved before it deletes.
const pinLockClass = 0x71746c70

// lockPins takes a policy's pin lock until the transaction ends.
func lockPins(ctx context.Context, tx pgx.Tx, policyID int32) error {
	if _, err := tx.Exec(ctx, `SELECT pg_advisory_xact_lock($1, $2)`, pinLockClass, policyID); err != nil {
		return fmt.Errorf("lock job windows: %w", err)
	}
	return nil
}

// PruneEpisodes deletes trained episodes received longer than retention
// ago, policy by policy, in transactions of at most batch episodes, and
// reports how many it deleted per policy name. Untrained episodes are never
// deleted (only episodes at or below the policy's training watermark go,
// which training never reads again), nor are those in the window of a
// queued or running evaluation or replay: a job reads every episode its
// window held when it was queued. Rows another pruner holds are skipped,
// so pruning never holds up training; choosing does not read episodes.
func (db *DB) PruneEpisodes(ctx context.Context, retention time.Duration, batch int) (map[string]int64, error) {
	policies, err := db.ListPolicies(ctx)
	if err != nil {
		return nil, err
	}
	pruned := map[string]int64{}
	for _, p := range policies {
		for {
			var deleted int64
			err := db.WithTx(ctx, func(tx pgx.Tx) error {
				if err := lockPins(ctx, tx, p.ID); err != nil {
					return err
				}
				tag, err := tx.Exec(ctx, `
					DELETE FROM episodes WHERE ctid = ANY(ARRAY(
						SELECT e.ctid FROM episodes e JOIN policies p USING (policy_id)
						WHERE e.policy_id = $1 AND NOT (`+untrained+`)
						  AND e.received_at < now() - make_interval(secs => $2)
						  AND NOT EXISTS (
						      SELECT 1 FROM jobs j
						      WHERE j.policy_id = $1 AND j.status IN ('queued', 'running')
						        AND e.seq BETWEEN (j.spec->'episodes'->>'first_seq')::bigint
						                      AND (j.spec->'episodes'->>'last_seq')::bigint)
						ORDER BY e.seq LIMIT $3
						FOR UPDATE OF e SKIP LOCKED))`, p.ID, retention.Seconds(), batch)
				deleted = tag.RowsAffected()
				return err
			})
			if err != nil {
				return pruned, mapError(fmt.Errorf("prune episodes of %q: %w", p.Name, err))
			}
			if deleted > 0 {
				pruned[p.Name] += deleted
			}
			if deleted < int64(batch) {
				break
			}
			if ctx.Err() != nil {
				return pruned, ctx.Err()
			}
		}
	}
	return pruned, nil
}
