package storage

import (
	"context"
	"errors"
	"fmt"

	"github.com/jackc/pgx/v5"

	"github.com/qtally/qtally/training"
)

// ingestLockClass namespaces the per-policy advisory lock that orders
// ingest commits (the two-key form: class, policy id).
const ingestLockClass = 0x71746c6a

// Ingest validates a batch against its policy and stores the episodes whose
// ids the policy has not stored yet, in one transaction: all or nothing.
func (db *DB) Ingest(ctx context.Context, policy string, episodes []training.Episode) (training.IngestResult, error) {
	var res training.IngestResult
	ingest := func(tx pgx.Tx) error {
		// KEY SHARE keeps the actions from changing under the batch without
		// blocking the worker's revision updates.
		p, err := scanPolicy(tx.QueryRow(ctx, `SELECT `+policyColumns+` FROM policies WHERE name = $1 FOR KEY SHARE`, policy))
		if errors.Is(err, pgx.ErrNoRows) {
			return training.NotFoundf("no policy named %q", policy)
		}
		if err != nil {
			return fmt.Errorf("read policy: %w", err)
		}
		records, err := training.EncodeEpisodes(p.Settings, p.ActionIndex(), episodes, db.limits)
		if err != nil {
			return err
		}
		fresh, err := withoutStored(ctx, tx, p, records)
		if err != nil {
			return err
		}
		res = training.IngestResult{Accepted: len(fresh), Duplicates: len(records) - len(fresh)}
		if len(fresh) == 0 {
			return nil
		}
		// Episodes take their seq during the COPY but become visible at
		// commit; without this lock a later seq could commit first, be
		// trained, and the earlier one be trained after it, out of arrival
		// order. Held to commit, it makes each policy's commits follow seq.
		if _, err := tx.Exec(ctx, `SELECT pg_advisory_xact_lock($1, $2)`, ingestLockClass, p.ID); err != nil {
			return fmt.Errorf("ingest lock: %w", err)
		}
		_, err = tx.CopyFrom(ctx, pgx.Identifier{"episodes"},
			[]string{"policy_id", "episode_id", "states", "actions", "rewards", "probabilities"},
			pgx.CopyFromSlice(len(fresh), func(i int) ([]any, error) {
				r := fresh[i]
				return []any{p.ID, r.ID, r.States, r.Actions, r.Rewards, r.Probabilities}, nil
			}))
		if err != nil {
			return fmt.Errorf("store episodes: %w", err)
		}
		_, err = tx.Exec(ctx, `SELECT pg_notify($1, $2::integer::text)`, ChannelEpisodes, p.ID)
		return err
	}
	err := db.WithTx(ctx, ingest)
	if isUniqueViolation(err) {
		// A concurrent request stored one of these ids first; the retry sees
		// it and counts it as a duplicate.
		err = db.WithTx(ctx, ingest)
	}
	return res, err
}

// withoutStored drops the episodes whose ids the policy already has with
// the same content, and refuses the batch when one has other content. Only
// the rows of ids already stored are read back and compared.
func withoutStored(ctx context.Context, tx pgx.Tx, p training.Policy, records []training.EpisodeRecord) ([]training.EpisodeRecord, error) {
	ids := make([]string, len(records))
	for i, r := range records {
		ids[i] = r.ID
	}
	rows, err := tx.Query(ctx, `SELECT episode_id, states, actions, rewards, probabilities
		FROM episodes WHERE policy_id = $1 AND episode_id = ANY($2)`, p.ID, ids)
	if err != nil {
		return nil, fmt.Errorf("look up episode ids: %w", err)
	}
	stored, err := pgx.CollectRows(rows, func(r pgx.CollectableRow) (training.EpisodeRecord, error) {
		var e training.EpisodeRecord
		err := r.Scan(&e.ID, &e.States, &e.Actions, &e.Rewards, &e.Probabilities)
		return e, err
	})
	if err != nil {
		return nil, fmt.Errorf("look up episode ids: %w", err)
	}
	if len(stored) == 0 {
		return records, nil
	}
	known := make(map[string]training.EpisodeRecord, len(stored))
	for _, e := range stored {
		known[e.ID] = e
	}
	const listed = 10
	var differences []string
	more := 0
	fresh := make([]training.EpisodeRecord, 0, len(records)-len(stored))
	for i, r := range records {
		old, ok := known[r.ID]
		if !ok {
			fresh = append(fresh, r)
			continue
		}
		if diff := training.EpisodeDifference(old, r, p.Actions); diff != "" {
			if len(differences) == listed {
				more++
				continue
			}
			differences = append(differences, fmt.Sprintf("episode %d (id %q): %s", i, r.ID, diff))
		}
	}
	if len(differences) > 0 {
		return nil, training.RepostConflict(differences, more)
	}
	return fresh, nil
}
