-- +goose Up
-- Signed-in status page sessions. The browser's cookie holds a random id;
-- only its SHA-256 is stored, so a copy of this table cannot be replayed.
-- Like api_tokens it is small, read by key and not per policy: distributed
-- by policy, it would be copied to every node.
CREATE TABLE page_sessions (
    session_digest bytea PRIMARY KEY,
    token_id       bigint NOT NULL,
    created_at     timestamptz NOT NULL DEFAULT now(),
    expires_at     timestamptz NOT NULL
);

-- Every state a policy has accepted (posted in an episode, imported or
-- restored), so that ingest can refuse new states beyond the policy's
-- max_states before anything is stored: an API process keeps a slot per
-- action for each state in memory.
CREATE TABLE policy_states (
    policy_id integer NOT NULL,
    state     text NOT NULL,
    PRIMARY KEY (policy_id, state)
);

INSERT INTO policy_states (policy_id, state)
SELECT policy_id, state FROM q_values
UNION
SELECT policy_id, unnest(states) FROM episodes WHERE trained_at IS NULL;

-- How many states each policy has accepted, kept with policy_states under
-- the policy's ingest lock, so that a batch of new states costs no count.
-- Apart from policies: its row would make ingest and training wait on
-- each other.
CREATE TABLE policy_state_counts (
    policy_id integer PRIMARY KEY,
    states    bigint NOT NULL
);

INSERT INTO policy_state_counts (policy_id, states)
SELECT policy_id, count(*) FROM policy_states GROUP BY policy_id;

-- The most states a policy accepts. Existing policies get the default the
-- service gives new ones (100000, and at most 1000000 pairs), or the states
-- they already have if that is more: nothing stored is refused.
ALTER TABLE policies ADD COLUMN max_states integer;
UPDATE policies p SET max_states = greatest(
    least(100000, 1000000 / cardinality(p.actions)),
    (SELECT coalesce(sum(c.states), 0) FROM policy_state_counts c WHERE c.policy_id = p.policy_id));
ALTER TABLE policies ALTER COLUMN max_states SET NOT NULL;

-- +goose Down
ALTER TABLE policies DROP COLUMN max_states;
DROP TABLE policy_state_counts;
DROP TABLE policy_states;
DROP TABLE page_sessions;
