-- +goose Up
-- How many choices API processes made per policy and minute, by action
-- and kind, so that the status page shows the mix whichever process
-- chose. Each process adds its in-memory counts every few seconds; rows
-- older than the history window are dropped as counts are added.
CREATE TABLE choice_counts (
    policy_id    integer NOT NULL,
    bucket_start timestamptz NOT NULL,
    -- The index of the action in the policy's actions.
    action       smallint NOT NULL,
    -- Chosen in explore mode (else greedy).
    explore      boolean NOT NULL,
    explored     boolean NOT NULL,
    known_state  boolean NOT NULL,
    choices      bigint NOT NULL,
    PRIMARY KEY (policy_id, bucket_start, action, explore, explored, known_state)
);

-- +goose Down
DROP TABLE choice_counts;
