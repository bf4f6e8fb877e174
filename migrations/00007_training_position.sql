-- +goose Up
-- Where a table's training stands in the arrival order: the largest seq of
-- the episodes trained into it (for a replay's policy, of its source's
-- episodes; seq is one sequence over every policy). Training takes a
-- policy's episodes in seq order, so an evaluation can tell which
-- episodes of its window the table it judges has already learned from, and
-- a window can hold only the episodes a snapshot has not learned from.
ALTER TABLE policies ADD COLUMN trained_through_seq bigint NOT NULL DEFAULT 0;
ALTER TABLE snapshots ADD COLUMN trained_through_seq bigint NOT NULL DEFAULT 0;

UPDATE policies p SET trained_through_seq = t.seq
FROM (SELECT policy_id, max(seq) AS seq FROM episodes WHERE trained_at IS NOT NULL GROUP BY policy_id) t
WHERE t.policy_id = p.policy_id;

-- A replay's policy has learned from its source's episodes up to the end
-- of the replay's window (counted whole, even if the replay stopped short:
-- the count errs towards "already learned").
UPDATE policies p SET trained_through_seq = greatest(p.trained_through_seq, r.seq)
FROM (SELECT (spec->>'target_policy_id')::integer AS policy_id, max((spec->'episodes'->>'last_seq')::bigint) AS seq
      FROM jobs WHERE kind = 'replay' GROUP BY 1) r
WHERE r.policy_id = p.policy_id;

-- A snapshot taken before now: the last of its policy's stored episodes
-- trained by the time it was taken. A batch that started before the
-- snapshot and committed after it counts too (trained_at is a batch's
-- start), again erring towards "already learned". When every stored
-- trained episode was trained later, the snapshot learned from none of
-- them; when none is stored (all pruned, or a replay's policy), the
-- policy's own position.
UPDATE snapshots s SET trained_through_seq = coalesce(
    (SELECT max(e.seq) FROM episodes e WHERE e.policy_id = s.policy_id AND e.trained_at <= s.created_at),
    (SELECT min(e.seq) - 1 FROM episodes e WHERE e.policy_id = s.policy_id AND e.trained_at > s.created_at),
    (SELECT p.trained_through_seq FROM policies p WHERE p.policy_id = s.policy_id));

-- +goose Down
ALTER TABLE snapshots DROP COLUMN trained_through_seq;
ALTER TABLE policies DROP COLUMN trained_through_seq;
