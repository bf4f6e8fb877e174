package storage

import (
	"context"
	"fmt"
	"time"
)

// PruneEpisodes deletes trained episodes received longer than retention
// ago, policy by policy, in transactions of at most batch episodes, and
// reports how many it deleted per policy name. Untrained episodes are never
// deleted. Rows a training batch holds are skipped, not waited for, so
// pruning never holds up training; choosing does not read episodes at all.
func (db *DB) PruneEpisodes(ctx context.Context, retention time.Duration, batch int) (map[string]int64, error) {
	policies, err := db.ListPolicies(ctx)
	if err != nil {
		return nil, err
	}
	pruned := map[string]int64{}
	for _, p := range policies {
		for {
			tag, err := db.pool.Exec(ctx, `
				DELETE FROM episodes WHERE ctid = ANY(ARRAY(
					SELECT ctid FROM episodes
					WHERE policy_id = $1 AND trained_at IS NOT NULL
					  AND received_at < now() - make_interval(secs => $2)
					ORDER BY seq LIMIT $3
					FOR UPDATE SKIP LOCKED))`, p.ID, retention.Seconds(), batch)
			if err != nil {
				return pruned, mapError(fmt.Errorf("prune episodes of %q: %w", p.Name, err))
			}
			if n := tag.RowsAffected(); n > 0 {
				pruned[p.Name] += n
			}
			if tag.RowsAffected() < int64(batch) {
				break
			}
			if ctx.Err() != nil {
				return pruned, ctx.Err()
			}
		}
	}
	return pruned, nil
}
