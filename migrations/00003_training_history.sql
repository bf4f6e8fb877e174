-- +goose Up
-- What training did, per policy and time bucket: the status page draws its
-- charts from here, so any API process can show them, whether or not it
-- runs the worker. The worker adds to the current bucket in the same
-- transaction as each batch and drops buckets older than its window.
CREATE TABLE training_history (
    policy_id      integer NOT NULL,
    bucket_start   timestamptz NOT NULL,
    batches        bigint NOT NULL,
    episodes       bigint NOT NULL,
    steps          bigint NOT NULL,
    -- Sum of the discounted return G0 of each trained episode.
    sum_return     double precision NOT NULL,
    -- Sum of |alpha (G - Q)| over every update, and how many updates.
    sum_abs_delta  double precision NOT NULL,
    updates        bigint NOT NULL,
    -- States whose set of greedy actions changed, summed over batches.
    greedy_changes bigint NOT NULL,
    -- States and pairs that got their first estimate in the bucket; with
    -- today's counts they give the coverage at the end of any bucket.
    new_states     bigint NOT NULL,
    new_pairs      bigint NOT NULL,
    -- Untrained episodes right after the bucket's first batch (a sample:
    -- counting after every batch would cost most when training is behind).
    backlog        bigint NOT NULL,
    last_batch_at  timestamptz NOT NULL,
    PRIMARY KEY (policy_id, bucket_start)
);

-- When the policy's last training batch committed (NULL: never).
ALTER TABLE policies ADD COLUMN last_trained_at timestamptz;

-- +goose Down
ALTER TABLE policies DROP COLUMN last_trained_at;
DROP TABLE training_history;
