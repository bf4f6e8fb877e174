package storage

import (
	"context"
	"errors"
	"fmt"

	"github.com/jackc/pgx/v5"

	"github.com/qtally/qtally/internal/views"
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
	_, err = training.ValidateAndEncodeEpisodes(p.Settings, episodes, db.limits)
	return err
}

// Ingest validates a batch against its policy and stores the episodes whose
// ids the policy has not stored yet, in one transaction: all or nothing.
func (db *DB) Ingest(ctx context.Context, policy string, episodes []training.Episode) (views.IngestResult, error) {
	var res views.IngestResult
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
		records, err := training.ValidateAndEncodeEpisodes(p.Settings, episodes, db.limits)
		if err != nil {
			return err
		}
		fresh, err := withoutStored(ctx, tx, p, records)
		if err != nil {
			return err
		}
		res = views.IngestResult{Accepted: len(fresh), Duplicates: len(records) - len(fresh)}
		if len(fresh) == 0 {
			return nil
		}
		// Episodes take their seq during the COPY but become visible at
		// commit; without this lock a later seq could commit first, be
		// trained, and the earlier one be trained after it, out of arrival
		// order. Held to commit, it makes each policy's commits follow seq.
		if _, err = tx.Exec(ctx, `SELECT pg_advisory_xact_lock($1, $2)`, ingestLockClass, p.ID); err != nil {
			return fmt.Errorf("ingest lock: %w", err)
		}
		// Under the same lock, so concurrent batches count each other's
		// states, and this sees every open id (opening an episode takes it).
		if err = refuseOpenIDs(ctx, tx, p.ID, episodes, fresh); err != nil {
			return err
		}
		if err = admitStates(ctx, tx, p, records, fresh); err != nil {
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
		scanErr := r.Scan(&e.ID, &e.States, &e.Actions, &e.Rewards, &e.Probabilities)
		return e, scanErr
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

// admitStates records the states of the fresh episodes as the policy's,
// and refuses the batch when the new ones pass its max_states. Over known
// states it costs one index probe per distinct state of the batch.
func admitStates(ctx context.Context, tx pgx.Tx, p training.Policy, records, fresh []training.EpisodeRecord) error {
	position := make(map[string]int, len(records))
	for i, r := range records {
		position[r.ID] = i
	}
	positions := make([]int, len(fresh))
	for i, r := range fresh {
		positions[i] = position[r.ID]
	}
	sightings := training.FirstSightings(fresh, positions)
	names := make([]string, len(sightings))
	for i, s := range sightings {
		names[i] = s.State
	}
	added, known, err := recordStates(ctx, tx, p.ID, names)
	if err != nil || known <= p.MaxStates {
		return err
	}
	isNew := make(map[string]bool, len(added))
	for _, s := range added {
		isNew[s] = true
	}
	room := p.MaxStates - (known - int64(len(added)))
	return training.StatesBeyondQuota(sightings, func(s string) bool { return isNew[s] }, room, p.MaxStates)
}

// recordStates records states as the policy's, and returns those it did
// not have and how many it has now (0 when none was new). Callers hold the
// policy's ingest lock or training lock, so counts do not interleave.
func recordStates(ctx context.Context, tx pgx.Tx, policyID int32, states []string) ([]string, int64, error) {
	rows, err := tx.Query(ctx, `INSERT INTO policy_states (policy_id, state) SELECT $1, unnest($2::text[])
		ON CONFLICT DO NOTHING RETURNING state`, policyID, states)
	if err != nil {
		return nil, 0, fmt.Errorf("record states: %w", err)
	}
	added, err := pgx.CollectRows(rows, pgx.RowTo[string])
	if err != nil {
		return nil, 0, fmt.Errorf("record states: %w", err)
	}
	if len(added) == 0 {
		return nil, 0, nil
	}
	known, err := countStates(ctx, tx, policyID, int64(len(added)))
	return added, known, err
}

// countStates adds n to the policy's state count and returns the new count.
func countStates(ctx context.Context, tx pgx.Tx, policyID int32, n int64) (int64, error) {
	var known int64
	err := tx.QueryRow(ctx, `INSERT INTO policy_state_counts (policy_id, states) VALUES ($1, $2)
		ON CONFLICT (policy_id) DO UPDATE SET states = policy_state_counts.states + excluded.states
		RETURNING states`, policyID, n).Scan(&known)
	if err != nil {
		return 0, fmt.Errorf("count states: %w", err)
	}
	return known, nil
}

// admitTableStates records the states of a policy's live table, just
// rewritten by a restore or import, and refuses the rewrite when they pass
// its max_states.
func admitTableStates(ctx context.Context, tx pgx.Tx, p training.Policy) error {
	if _, err := tx.Exec(ctx, `SELECT pg_advisory_xact_lock($1, $2)`, ingestLockClass, p.ID); err != nil {
		return fmt.Errorf("ingest lock: %w", err)
	}
	tag, err := tx.Exec(ctx, `INSERT INTO policy_states (policy_id, state)
		SELECT DISTINCT policy_id, state FROM q_values WHERE policy_id = $1 ON CONFLICT DO NOTHING`, p.ID)
	if err != nil {
		return fmt.Errorf("record states: %w", err)
	}
	known, err := countStates(ctx, tx, p.ID, tag.RowsAffected())
	if err != nil {
		return err
	}
	if known > p.MaxStates {
		return training.Quotaf("with this table policy %q would know %d states, more than its max_states of %d; nothing was changed: raise max_states with PUT on the policy first",
			p.Name, known, p.MaxStates)
	}
	return nil
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
