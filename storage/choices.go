package storage

import (
	"context"
	"fmt"
	"net/url"

	"github.com/jackc/pgx/v5"

	"github.com/qtally/qtally/internal/views"
	"github.com/qtally/qtally/training"
)

// choicesAdd adds API processes' choice counts to the current coarse
// history bucket of each policy and drops the policies' rows that left the
// history window, in one statement. Counts of a policy erased meanwhile
// are dropped by the join. Per policy the table holds at most
// (Window/Bucket + 1) x actions x 6 rows (greedy mode never explores).
const choicesAdd = `
	WITH pruned AS (
		DELETE FROM choice_counts c
		WHERE c.policy_id = ANY($1::integer[]) AND c.bucket_start < now() - $8::bigint * interval '1 microsecond'
	)
	INSERT INTO choice_counts AS c (policy_id, bucket_start, action, explore, explored, known_state, choices)
	SELECT u.policy_id, date_bin($7::bigint * interval '1 microsecond', now(), timestamptz 'epoch'),
		u.action, u.explore, u.explored, u.known_state, u.choices
	FROM unnest($1::integer[], $2::smallint[], $3::boolean[], $4::boolean[], $5::boolean[], $6::bigint[])
		AS u(policy_id, action, explore, explored, known_state, choices)
	JOIN policies p USING (policy_id)
	ON CONFLICT (policy_id, bucket_start, action, explore, explored, known_state)
	DO UPDATE SET choices = c.choices + excluded.choices`

// AddChoiceCounts stores choice counts in the current history bucket.
func (db *DB) AddChoiceCounts(ctx context.Context, counts []training.ChoiceCount) error {
	n := len(counts)
	policies, actions, choices := make([]int32, n), make([]int16, n), make([]int64, n)
	explore, explored, known := make([]bool, n), make([]bool, n), make([]bool, n)
	for i, c := range counts {
		policies[i], actions[i], choices[i] = c.PolicyID, c.Action, c.Count
		explore[i], explored[i], known[i] = c.Explore, c.Explored, c.KnownState
	}
	_, err := db.pool.Exec(ctx, choicesAdd, policies, actions, explore, explored, known, choices,
		db.history.Bucket.Microseconds(), db.history.Window.Microseconds())
	if err != nil {
		return mapError(fmt.Errorf("add choice counts: %w", err))
	}
	return nil
}

// choicesRead reads a policy's choice counts that start within the last
// $2 microseconds, oldest first.
const choicesRead = `
	SELECT bucket_start, action, explore, explored, known_state, choices
	FROM choice_counts
	WHERE policy_id = $1 AND bucket_start >= now() - $2::bigint * interval '1 microsecond'
	ORDER BY bucket_start, action`

// maxEventsShown bounds each kind of event read for the status page.
const maxEventsShown = 200

// eventsRead reads what was done to a policy within the last $3
// microseconds: snapshots taken, restores that succeeded, settings
// changes and evaluations finished, the latest of each kind, oldest first.
const eventsRead = `
	SELECT at, kind, label, value FROM (
		(SELECT created_at AS at, 'snapshot' AS kind, name AS label, NULL::double precision AS value FROM snapshots
		 WHERE policy_id = $1 AND created_at >= now() - $3::bigint * interval '1 microsecond'
		 ORDER BY created_at DESC LIMIT $4)
		UNION ALL
		(SELECT at, 'restore', coalesce(substring(path FROM '/snapshots/([^/?]+)/restore'), ''), NULL FROM audit_log
		 WHERE policy = $2 AND route LIKE '%/restore' AND status < 300 AND at >= now() - $3::bigint * interval '1 microsecond'
		   -- Not a restore of an erased policy of the same name.
		   AND at >= (SELECT created_at FROM policies WHERE policy_id = $1)
		 ORDER BY audit_id DESC LIMIT $4)
		UNION ALL
		(SELECT changed_at, 'settings', kind || coalesce(': ' || (SELECT string_agg(f->>'field', ', ') FROM jsonb_array_elements(fields) f), ''), NULL
		 FROM settings_changes
		 WHERE policy_id = $1 AND changed_at >= now() - $3::bigint * interval '1 microsecond'
		 ORDER BY change_id DESC LIMIT $4)
		UNION ALL
		(SELECT finished_at, 'evaluation', 'job ' || job_id, (result->'weighted'->>'estimate')::double precision
		 FROM jobs
		 WHERE policy_id = $1 AND kind = 'evaluation' AND status = 'succeeded'
		   AND finished_at >= now() - $3::bigint * interval '1 microsecond'
		 ORDER BY finished_at DESC LIMIT $4)
	) e ORDER BY at`

// readChoicesAndEvents adds a policy's choice counts and events within the
// report's window to the report.
func (db *DB) readChoicesAndEvents(ctx context.Context, tx pgx.Tx, report *views.PolicyReport) error {
	st := report.Status
	rows, err := tx.Query(ctx, choicesRead, st.ID, report.Window.Microseconds())
	if err != nil {
		return fmt.Errorf("read choice counts: %w", err)
	}
	var b training.ChoiceBucket
	b.Width = db.history.Bucket
	_, err = pgx.ForEachRow(rows, []any{&b.Start, &b.Action, &b.Explore, &b.Explored, &b.KnownState, &b.Count}, func() error {
		report.ChoiceBuckets = append(report.ChoiceBuckets, b)
		return nil
	})
	if err != nil {
		return fmt.Errorf("read choice counts: %w", err)
	}
	rows, err = tx.Query(ctx, eventsRead, st.ID, st.Name, report.Window.Microseconds(), maxEventsShown)
	if err != nil {
		return fmt.Errorf("read policy events: %w", err)
	}
	var e training.PolicyEvent
	_, err = pgx.ForEachRow(rows, []any{&e.At, &e.Kind, &e.Label, &e.Value}, func() error {
		if e.Kind == "restore" {
			// The path holds the snapshot's name escaped.
			if name, unescapeErr := url.PathUnescape(e.Label); unescapeErr == nil {
				e.Label = name
			}
		}
		if e.Value != nil {
			v := *e.Value
			e.Value = &v
		}
		report.Events = append(report.Events, e)
		return nil
	})
	if err != nil {
		return fmt.Errorf("read policy events: %w", err)
	}
	return nil
}
