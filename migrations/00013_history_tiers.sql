-- +goose Up
-- Training history in two resolutions: fine rows (seconds) for the recent
-- past, so that a policy's first minute already draws a curve, and coarse
-- rows (minutes) beyond. The worker rolls fine rows that age past the fine
-- window into coarse ones as it writes. Rows stored so far were written at
-- the coarse width, so they stay as coarse rows.
ALTER TABLE training_history ADD COLUMN fine boolean NOT NULL DEFAULT false;
ALTER TABLE training_history DROP CONSTRAINT training_history_pkey;
ALTER TABLE training_history ADD PRIMARY KEY (policy_id, fine, bucket_start);
ALTER TABLE training_history ALTER COLUMN fine DROP DEFAULT;
-- The backlog is sampled at most every few seconds, not in every fine
-- bucket: NULL where a row holds no sample.
ALTER TABLE training_history ALTER COLUMN backlog DROP NOT NULL;

-- What the application wants the mean return to reach (an optimum it
-- knows, or a goal), as {"value": number, "label": text}; NULL: none. The
-- status page draws it beside the learning curve.
ALTER TABLE policies ADD COLUMN return_target jsonb;

-- +goose Down
ALTER TABLE policies DROP COLUMN return_target;
-- Fine rows fold into one-minute rows (the default coarse width).
INSERT INTO training_history AS h (policy_id, fine, bucket_start, batches, episodes, steps, sum_return,
    sum_abs_delta, updates, greedy_changes, new_states, new_pairs, backlog, last_batch_at)
SELECT policy_id, false, date_bin(interval '1 minute', bucket_start, timestamptz 'epoch'), sum(batches), sum(episodes),
       sum(steps), sum(sum_return), sum(sum_abs_delta), sum(updates), sum(greedy_changes), sum(new_states),
       sum(new_pairs), (array_agg(backlog ORDER BY bucket_start) FILTER (WHERE backlog IS NOT NULL))[1], max(last_batch_at)
FROM training_history WHERE fine GROUP BY 1, 3
ON CONFLICT (policy_id, fine, bucket_start) DO UPDATE SET
    batches = h.batches + excluded.batches, episodes = h.episodes + excluded.episodes,
    steps = h.steps + excluded.steps, sum_return = h.sum_return + excluded.sum_return,
    sum_abs_delta = h.sum_abs_delta + excluded.sum_abs_delta, updates = h.updates + excluded.updates,
    greedy_changes = h.greedy_changes + excluded.greedy_changes, new_states = h.new_states + excluded.new_states,
    new_pairs = h.new_pairs + excluded.new_pairs, backlog = coalesce(h.backlog, excluded.backlog),
    last_batch_at = greatest(h.last_batch_at, excluded.last_batch_at);
DELETE FROM training_history WHERE fine;
UPDATE training_history SET backlog = 0 WHERE backlog IS NULL;
ALTER TABLE training_history ALTER COLUMN backlog SET NOT NULL;
ALTER TABLE training_history DROP CONSTRAINT training_history_pkey;
ALTER TABLE training_history ADD PRIMARY KEY (policy_id, bucket_start);
ALTER TABLE training_history DROP COLUMN fine;
