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

// CheckEpisodes validates episodes against a policy as Ingest does, and
// stores nothing: refusals list the policy's problems beside others.
func (db *DB) CheckEpisodes(ctx context.Context, policy string, episodes []training.Episode) error {
	p, err := db.PolicyByName(ctx, policy)
	if err != nil {
		return err
	}
	_, err = training.EncodeEpisodes(p.Settings, p.ActionIndex(), episodes, db.limits)
	return err
}

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
		fresh, err := withoutStored(ctx, tx, p.ID, records)
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
		// Opening an episode takes the same lock, so this sees every open id.
		if err := refuseOpenIDs(ctx, tx, p.ID, episodes, fresh); err != nil {
			return err
		}
		_, err = tx.CopyFrom(ctx, pgx.Identifier{"episodes"},
			[]string{"policy_id", "episode_id", "states", "actions", "rewards", "probabilities", "allowed"},
			pgx.CopyFromSlice(len(fresh), func(i int) ([]any, error) {
				r := fresh[i]
				return []any{p.ID, r.ID, r.States, r.Actions, r.Rewards, r.Probabilities, r.Allowed}, nil
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

// withoutStored drops the episodes whose ids the policy already has.
func withoutStored(ctx context.Context, tx pgx.Tx, policyID int32, records []training.EpisodeRecord) ([]training.EpisodeRecord, error) {
	ids := make([]string, len(records))
	for i, r := range records {
		ids[i] = r.ID
	}
	rows, err := tx.Query(ctx, `SELECT episode_id FROM episodes WHERE policy_id = $1 AND episode_id = ANY($2)`, policyID, ids)
	if err != nil {
		return nil, fmt.Errorf("look up episode ids: %w", err)
	}
	stored, err := pgx.CollectRows(rows, pgx.RowTo[string])
	if err != nil {
		return nil, fmt.Errorf("look up episode ids: %w", err)
	}
	if len(stored) == 0 {
		return records, nil
	}
	known := make(map[string]bool, len(stored))
	for _, id := range stored {
		known[id] = true
	}
	fresh := make([]training.EpisodeRecord, 0, len(records)-len(stored))
	for _, r := range records {
		if !known[r.ID] {
			fresh = append(fresh, r)
		}
	}
	return fresh, nil
}

// refuseOpenIDs refuses a batch that posts an episode under the id of one
// qtally keeps open, naming each such episode by its index in the request.
func refuseOpenIDs(ctx context.Context, tx pgx.Tx, policyID int32, episodes []training.Episode, fresh []training.EpisodeRecord) error {
	ids := make([]string, len(fresh))
	for i, r := range fresh {
		ids[i] = r.ID
	}
	open, err := openIDs(ctx, tx, policyID, ids, false)
	if err != nil || len(open) == 0 {
		return err
	}
	isOpen := make(map[string]bool, len(open))
	for _, id := range open {
		isOpen[id] = true
	}
	var problems []training.FieldError
	for i, ep := range episodes {
		if isOpen[ep.ID] {
			problems = append(problems, training.FieldError{Episode: i, Step: -1, Field: "id",
				Message: fmt.Sprintf("%q is the id of an episode qtally keeps open for this policy; end that episode, or post under another id", ep.ID)})
		}
	}
	return training.Refuse(problems)
}
