package storage

import (
	"context"
	"fmt"
	"time"
)

// PruneEpisodes deletes trained episodes received longer than retention
// ago, policy by policy, in transactions of at most batch episodes, and
// reports how many it deleted per policy name. Untrained episodes are never
// deleted: only episodes at or below the policy's training watermark go,
// which training never reads again, so pruning never holds up training
// (rows another pruner holds are skipped); choosing does not read episodes.
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
					SELECT e.ctid FROM episodes e JOIN policies p USING (policy_id)
					WHERE e.policy_id = $1 AND NOT (`+untrained+`)
					  AND e.received_at < now() - make_interval(secs => $2)
					ORDER BY e.seq LIMIT $3
					FOR UPDATE OF e SKIP LOCKED))`, p.ID, retention.Seconds(), batch)
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
