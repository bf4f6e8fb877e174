package storage

import (
	"context"
	"errors"
	"fmt"
	"slices"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/qtally/qtally/training"
)

// readTx runs fn in a read-only repeatable-read transaction, so that every
// statement of fn sees the same committed state.
func (db *DB) readTx(ctx context.Context, fn func(pgx.Tx) error) error {
	tx, err := db.pool.BeginTx(ctx, pgx.TxOptions{IsoLevel: pgx.RepeatableRead, AccessMode: pgx.ReadOnly})
	if err != nil {
		return mapError(fmt.Errorf("begin: %w", err))
	}
	defer tx.Rollback(context.WithoutCancel(ctx)) //nolint:errcheck // read-only: nothing to keep
	return mapError(fn(tx))
}

const snapshotColumns = `name, created_at, revision, actions, initial_q, states, pairs, trained_through_seq`

func scanSnapshot(row pgx.Row) (training.Snapshot, error) {
	var s training.Snapshot
	err := row.Scan(&s.Name, &s.CreatedAt, &s.Revision, &s.Actions, &s.InitialQ, &s.States, &s.Pairs, &s.TrainedThroughSeq)
	return s, err
}

// snapshotQuotaLockClass namespaces the per-policy lock of the snapshot count.
const snapshotQuotaLockClass = 0x71747371

// CreateSnapshot freezes a policy's live table under a name. One statement
// reads the revision and the rows, so they agree without holding up
// training.
func (db *DB) CreateSnapshot(ctx context.Context, policy, name string) (training.Snapshot, error) {
	p, err := db.PolicyByName(ctx, policy)
	if err != nil {
		return training.Snapshot{}, err
	}
	var s training.Snapshot
	err = db.WithTx(ctx, func(tx pgx.Tx) error {
		if _, lockErr := tx.Exec(ctx, `SELECT pg_advisory_xact_lock($1, $2)`, snapshotQuotaLockClass, p.ID); lockErr != nil {
			return fmt.Errorf("snapshot quota lock: %w", lockErr)
		}
		var n int
		if countErr := tx.QueryRow(ctx, `SELECT count(*) FROM snapshots WHERE policy_id = $1`, p.ID).Scan(&n); countErr != nil {
			return fmt.Errorf("count snapshots: %w", countErr)
		}
		if n >= db.limits.MaxSnapshotsPerPolicy {
			return training.Quotaf("policy %q has %d snapshots, its limit (--max-snapshots-per-policy %d); delete one first", policy, n, db.limits.MaxSnapshotsPerPolicy)
		}
		s, err = scanSnapshot(tx.QueryRow(ctx, `
		WITH snap AS (
			INSERT INTO snapshots (policy_id, name, revision, actions, initial_q, trained_through_seq, states, pairs)
			SELECT p.policy_id, $2, p.revision, p.actions, p.initial_q, p.trained_through_seq,
			       (SELECT count(DISTINCT state) FROM q_values q WHERE q.policy_id = p.policy_id),
			       (SELECT count(*) FROM q_values q WHERE q.policy_id = p.policy_id)
			FROM policies p WHERE p.policy_id = $1
			RETURNING snapshot_id, `+snapshotColumns+`
		), copied AS (
			INSERT INTO snapshot_values (policy_id, snapshot_id, state, action, q, visits, last_delta, updated_at)
			SELECT q.policy_id, snap.snapshot_id, q.state, q.action, q.q, q.visits, q.last_delta, q.updated_at
			FROM q_values q, snap WHERE q.policy_id = $1
		)
		SELECT `+snapshotColumns+` FROM snap`, p.ID, name))
		return err
	})
	if isUniqueViolation(err) {
		return s, training.Conflictf("policy %q already has a snapshot named %q", policy, name)
	}
	if err != nil {
		return s, mapError(fmt.Errorf("create snapshot: %w", err))
	}
	return s, nil
}

// ListSnapshots lists a policy's snapshots, oldest first.
func (db *DB) ListSnapshots(ctx context.Context, policy string) ([]training.Snapshot, error) {
	p, err := db.PolicyByName(ctx, policy)
	if err != nil {
		return nil, err
	}
	rows, err := db.pool.Query(ctx, `SELECT `+snapshotColumns+` FROM snapshots WHERE policy_id = $1 ORDER BY snapshot_id`, p.ID)
	if err != nil {
		return nil, mapError(fmt.Errorf("list snapshots: %w", err))
	}
	list, err := pgx.CollectRows(rows, func(r pgx.CollectableRow) (training.Snapshot, error) { return scanSnapshot(r) })
	if err != nil {
		return nil, mapError(fmt.Errorf("list snapshots: %w", err))
	}
	return list, nil
}

// Snapshot describes one snapshot.
func (db *DB) Snapshot(ctx context.Context, policy, name string) (training.Snapshot, error) {
	p, err := db.PolicyByName(ctx, policy)
	if err != nil {
		return training.Snapshot{}, err
	}
	s, err := scanSnapshot(db.pool.QueryRow(ctx, `SELECT `+snapshotColumns+` FROM snapshots WHERE policy_id = $1 AND name = $2`, p.ID, name))
	if errors.Is(err, pgx.ErrNoRows) {
		return s, noSnapshot(policy, name)
	}
	if err != nil {
		return s, mapError(fmt.Errorf("read snapshot: %w", err))
	}
	return s, nil
}

func noSnapshot(policy, name string) error {
	return training.NotFoundf("policy %q has no snapshot named %q", policy, name)
}

// DeleteSnapshot removes a snapshot and its rows.
func (db *DB) DeleteSnapshot(ctx context.Context, policy, name string) error {
	p, err := db.PolicyByName(ctx, policy)
	if err != nil {
		return err
	}
	return db.WithTx(ctx, func(tx pgx.Tx) error {
		var id int64
		err := tx.QueryRow(ctx, `DELETE FROM snapshots WHERE policy_id = $1 AND name = $2 RETURNING snapshot_id`, p.ID, name).Scan(&id)
		if errors.Is(err, pgx.ErrNoRows) {
			return noSnapshot(policy, name)
		}
		if err != nil {
			return fmt.Errorf("delete snapshot: %w", err)
		}
		if _, err := tx.Exec(ctx, `DELETE FROM snapshot_values WHERE policy_id = $1 AND snapshot_id = $2`, p.ID, id); err != nil {
			return fmt.Errorf("delete snapshot rows: %w", err)
		}
		return nil
	})
}

// tableHeader is what a table's rows mean: its actions, initial value,
// revision and training position, and where its rows are (snapshot 0 is
// the live table).
type tableHeader struct {
	actions        []string
	initialQ       float64
	revision       int64
	trainedThrough int64
	snapshotID     int64
}

func readTableHeader(ctx context.Context, tx pgx.Tx, p training.Policy, table string) (tableHeader, error) {
	if table == training.LiveTable {
		h := tableHeader{}
		err := tx.QueryRow(ctx, `SELECT actions, initial_q, revision, trained_through_seq FROM policies WHERE policy_id = $1`, p.ID).
			Scan(&h.actions, &h.initialQ, &h.revision, &h.trainedThrough)
		if err != nil {
			return h, fmt.Errorf("read policy: %w", err)
		}
		return h, nil
	}
	var h tableHeader
	err := tx.QueryRow(ctx, `SELECT snapshot_id, actions, initial_q, revision, trained_through_seq FROM snapshots WHERE policy_id = $1 AND name = $2`, p.ID, table).
		Scan(&h.snapshotID, &h.actions, &h.initialQ, &h.revision, &h.trainedThrough)
	if errors.Is(err, pgx.ErrNoRows) {
		return h, noSnapshot(p.Name, table)
	}
	if err != nil {
		return h, fmt.Errorf("read snapshot: %w", err)
	}
	return h, nil
}

// forEachTableRow calls fn for each row of a table, in state and action order.
func forEachTableRow(ctx context.Context, tx pgx.Tx, policyID int32, h tableHeader, fn func(state string, action int16, q float64, visits int64)) error {
	var rows pgx.Rows
	var err error
	if h.snapshotID == 0 {
		rows, err = tx.Query(ctx, `SELECT state, action, q, visits FROM q_values WHERE policy_id = $1 ORDER BY state, action`, policyID)
	} else {
		rows, err = tx.Query(ctx, `SELECT state, action, q, visits FROM snapshot_values
			WHERE policy_id = $1 AND snapshot_id = $2 ORDER BY state, action`, policyID, h.snapshotID)
	}
	if err != nil {
		return fmt.Errorf("read table: %w", err)
	}
	var state string
	var action int16
	var q float64
	var visits int64
	_, err = pgx.ForEachRow(rows, []any{&state, &action, &q, &visits}, func() error {
		fn(state, action, q, visits)
		return nil
	})
	if err != nil {
		return fmt.Errorf("read table: %w", err)
	}
	return nil
}

// ExportTable reads a policy's live table or a snapshot whole.
func (db *DB) ExportTable(ctx context.Context, policy, table string) (training.TableExport, error) {
	p, err := db.PolicyByName(ctx, policy)
	if err != nil {
		return training.TableExport{}, err
	}
	out := training.TableExport{Policy: p.Name, Table: table, Rows: []training.TableRow{}}
	err = db.readTx(ctx, func(tx pgx.Tx) error {
		h, headerErr := readTableHeader(ctx, tx, p, table)
		if headerErr != nil {
			return headerErr
		}
		out.Actions, out.InitialQ, out.Revision = h.actions, h.initialQ, h.revision
		return forEachTableRow(ctx, tx, p.ID, h, func(state string, action int16, q float64, visits int64) {
			out.Rows = append(out.Rows, training.TableRow{State: state, Action: h.actions[action], Q: q, Visits: visits})
		})
	})
	return out, err
}

// LoadTable implements training.EvaluationSource.
func (db *DB) LoadTable(ctx context.Context, policyID int32, table string) (*training.QTable, error) {
	p, err := db.PolicyByID(ctx, policyID)
	if err != nil {
		return nil, err
	}
	var t *training.QTable
	err = db.readTx(ctx, func(tx pgx.Tx) error {
		h, headerErr := readTableHeader(ctx, tx, p, table)
		if headerErr != nil {
			return headerErr
		}
		t = training.NewQTable(h.actions, h.initialQ)
		t.Revision, t.TrainedThroughSeq = h.revision, h.trainedThrough
		return forEachTableRow(ctx, tx, p.ID, h, t.Set)
	})
	return t, err
}

// DiffTables compares the greedy policies of two tables: table of policy
// and against of againstPolicy (which may be the same policy).
func (db *DB) DiffTables(ctx context.Context, policy, table, againstPolicy, against string, limit int) (training.TableDiff, error) {
	p, err := db.PolicyByName(ctx, policy)
	if err != nil {
		return training.TableDiff{}, err
	}
	q := p
	if againstPolicy != policy {
		if q, err = db.PolicyByName(ctx, againstPolicy); err != nil {
			return training.TableDiff{}, err
		}
	}
	from, err := db.LoadTable(ctx, p.ID, table)
	if err != nil {
		return training.TableDiff{}, err
	}
	to, err := db.LoadTable(ctx, q.ID, against)
	if err != nil {
		return training.TableDiff{}, err
	}
	if !slices.Equal(from.Actions, to.Actions) {
		return training.TableDiff{}, training.Conflictf("the tables list different actions (%q and %q), so their greedy actions cannot be compared", from.Actions, to.Actions)
	}
	d := training.DiffTables(from, to, limit)
	d.From, d.To = p.Name+"/"+table, q.Name+"/"+against
	return d, nil
}

// lockTraining waits for the policy's training lock for the rest of the
// transaction: no training batch of the policy runs until it ends.
func lockTraining(ctx context.Context, tx pgx.Tx, policyID int32) error {
	if _, err := tx.Exec(ctx, `SELECT pg_advisory_xact_lock($1, $2)`, trainingLockClass, policyID); err != nil {
		return fmt.Errorf("training lock: %w", err)
	}
	return nil
}

// lockedPolicy reads a policy by name after taking its training lock, and
// keeps its actions from changing until the transaction ends.
func lockedPolicy(ctx context.Context, tx pgx.Tx, name string) (training.Policy, error) {
	var id int32
	err := tx.QueryRow(ctx, `SELECT policy_id FROM policies WHERE name = $1`, name).Scan(&id)
	if errors.Is(err, pgx.ErrNoRows) {
		return training.Policy{}, training.NotFoundf("no policy named %q", name)
	}
	if err != nil {
		return training.Policy{}, fmt.Errorf("read policy: %w", err)
	}
	if err = lockTraining(ctx, tx, id); err != nil {
		return training.Policy{}, err
	}
	p, err := scanPolicy(tx.QueryRow(ctx, `SELECT `+policyColumns+` FROM policies WHERE policy_id = $1 FOR KEY SHARE`, id))
	if err != nil {
		return p, fmt.Errorf("read policy: %w", err)
	}
	return p, nil
}

// replaceTable empties a policy's table and starts a new revision and
// epoch, which the rows written next carry; the caller holds the training
// lock. Readers of the change feed reload on the new epoch. The new table's
// initial value, when given, becomes the policy's: pairs the table lacks
// mean that value. It returns the revision, the initial value in force and
// the transaction's time.
func replaceTable(ctx context.Context, tx pgx.Tx, policyID int32, initialQ *float64) (int64, float64, time.Time, error) {
	if _, err := tx.Exec(ctx, `DELETE FROM q_values WHERE policy_id = $1`, policyID); err != nil {
		return 0, 0, time.Time{}, fmt.Errorf("clear table: %w", err)
	}
	var revision int64
	var initial float64
	var now time.Time
	err := tx.QueryRow(ctx, `UPDATE policies SET revision = revision + 1, table_epoch = table_epoch + 1,
			initial_q = coalesce($2, initial_q),
			updated_at = CASE WHEN coalesce($2, initial_q) <> initial_q THEN now() ELSE updated_at END
		WHERE policy_id = $1 RETURNING revision, initial_q, now()`, policyID, initialQ).Scan(&revision, &initial, &now)
	if err != nil {
		return 0, 0, now, fmt.Errorf("bump revision: %w", err)
	}
	return revision, initial, now, nil
}

func notifyPolicy(ctx context.Context, tx pgx.Tx, policyID int32) error {
	if _, err := tx.Exec(ctx, `SELECT pg_notify($1, $2::integer::text)`, ChannelPolicy, policyID); err != nil {
		return fmt.Errorf("notify: %w", err)
	}
	return nil
}

// RestoreSnapshot implements training.TableStore.
func (db *DB) RestoreSnapshot(ctx context.Context, policy, snapshot string) (training.TableChange, error) {
	ch := training.TableChange{Policy: policy, Source: snapshot}
	err := db.WithTx(ctx, func(tx pgx.Tx) error {
		p, err := lockedPolicy(ctx, tx, policy)
		if err != nil {
			return err
		}
		ch.PolicyID = p.ID
		h, err := readTableHeader(ctx, tx, p, snapshot)
		if err != nil {
			return err
		}
		if !slices.Equal(h.actions, p.Actions) {
			return training.Conflictf("snapshot %q lists the actions %q, the policy now %q: its rows would name other actions", snapshot, h.actions, p.Actions)
		}
		if ch.Revision, ch.InitialQ, _, err = replaceTable(ctx, tx, p.ID, &h.initialQ); err != nil {
			return err
		}
		// The live table has now learned from what the snapshot had.
		if _, err = tx.Exec(ctx, `UPDATE policies SET trained_through_seq = $2 WHERE policy_id = $1`, p.ID, h.trainedThrough); err != nil {
			return fmt.Errorf("restore training position: %w", err)
		}
		tag, err := tx.Exec(ctx, `
			INSERT INTO q_values (policy_id, state, action, q, visits, last_delta, updated_at, revision)
			SELECT policy_id, state, action, q, visits, last_delta, updated_at, $3
			FROM snapshot_values WHERE policy_id = $1 AND snapshot_id = $2`, p.ID, h.snapshotID, ch.Revision)
		if err != nil {
			return fmt.Errorf("restore rows: %w", err)
		}
		ch.Pairs = int(tag.RowsAffected())
		if err := admitTableStates(ctx, tx, p); err != nil {
			return err
		}
		return notifyPolicy(ctx, tx, p.ID)
	})
	return ch, err
}

// ImportTable implements training.TableStore.
func (db *DB) ImportTable(ctx context.Context, policy string, rows []training.TableRow, initialQ *float64) (training.TableChange, error) {
	ch := training.TableChange{Policy: policy, Source: "import"}
	err := db.WithTx(ctx, func(tx pgx.Tx) error {
		p, err := lockedPolicy(ctx, tx, policy)
		if err != nil {
			return err
		}
		ch.PolicyID = p.ID
		pairs, err := training.EncodeTable(p, rows, db.limits.MaxStateLength)
		if err != nil {
			return err
		}
		var now time.Time
		if ch.Revision, ch.InitialQ, now, err = replaceTable(ctx, tx, p.ID, initialQ); err != nil {
			return err
		}
		n, err := tx.CopyFrom(ctx, pgx.Identifier{"q_values"},
			[]string{"policy_id", "state", "action", "q", "visits", "last_delta", "updated_at", "revision"},
			pgx.CopyFromSlice(len(pairs), func(i int) ([]any, error) {
				pr := pairs[i]
				return []any{p.ID, pr.State, pr.Action, pr.Q, pr.Visits, 0.0, now, ch.Revision}, nil
			}))
		if err != nil {
			return fmt.Errorf("import rows: %w", err)
		}
		ch.Pairs = int(n)
		if err := admitTableStates(ctx, tx, p); err != nil {
			return err
		}
		return notifyPolicy(ctx, tx, p.ID)
	})
	return ch, err
}
