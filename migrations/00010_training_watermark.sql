-- +goose Up
-- The episode log becomes append-only: instead of stamping every trained
-- episode (an update per row, so dead tuples, WAL and vacuum on the hottest
-- table), each policy keeps the seq of the last episode training has
-- applied. A policy's episodes commit in seq order (ingest holds the
-- policy's lock from COPY to commit) and training takes them in seq order,
-- so the trained episodes are exactly those with seq <= trained_through.
ALTER TABLE policies ADD COLUMN trained_through bigint NOT NULL DEFAULT 0;

-- Trained episodes have always formed a prefix of each policy's seq order.
-- Should a database hold a trained episode after an untrained one, no
-- watermark says what was trained: stop rather than train something twice
-- or skip it.
-- +goose StatementBegin
DO $$
DECLARE
    gap record;
BEGIN
    SELECT e.policy_id, f.first_untrained, min(e.seq) AS trained_after, count(*) AS how_many
    INTO gap
    FROM episodes e
    JOIN (SELECT policy_id, min(seq) AS first_untrained FROM episodes
          WHERE trained_at IS NULL GROUP BY policy_id) f
      ON f.policy_id = e.policy_id AND e.seq > f.first_untrained
    WHERE e.trained_at IS NOT NULL
    GROUP BY e.policy_id, f.first_untrained
    LIMIT 1;
    IF FOUND THEN
        RAISE EXCEPTION 'policy % has % trained episodes after its untrained episode seq % (the first at seq %): training order was broken, so no training watermark is exact; mark those episodes trained or untrained by hand (episodes.trained_at) and migrate again',
            gap.policy_id, gap.how_many, gap.first_untrained, gap.trained_after;
    END IF;
END
$$;
-- +goose StatementEnd

UPDATE policies p SET trained_through = t.last_seq
FROM (SELECT policy_id, max(seq) AS last_seq FROM episodes
      WHERE trained_at IS NOT NULL GROUP BY policy_id) t
WHERE t.policy_id = p.policy_id;

-- Untrained episodes are now seq > trained_through: the primary key
-- (policy_id, seq) finds them.
DROP INDEX episodes_untrained;
ALTER TABLE episodes DROP COLUMN trained_at;

-- +goose Down
ALTER TABLE episodes ADD COLUMN trained_at timestamptz;
UPDATE episodes e SET trained_at = coalesce(p.last_trained_at, now())
FROM policies p
WHERE p.policy_id = e.policy_id AND e.seq <= p.trained_through;
CREATE INDEX episodes_untrained ON episodes (policy_id, seq) WHERE trained_at IS NULL;
ALTER TABLE policies DROP COLUMN trained_through;
