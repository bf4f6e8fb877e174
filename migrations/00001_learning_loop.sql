-- +goose Up
-- Every table and index leads with policy_id, and nothing joins or
-- transacts across policies, so the schema can be distributed by policy.

CREATE TABLE policies (
    policy_id            integer GENERATED ALWAYS AS IDENTITY PRIMARY KEY,
    name                 text NOT NULL UNIQUE,
    actions              text[] NOT NULL,
    gamma                double precision NOT NULL,
    alpha                double precision NOT NULL,
    epsilon              double precision NOT NULL,
    epsilon_min          double precision NOT NULL,
    -- k of epsilon(s) = max(epsilon_min, epsilon * k / (k + N(s))); NULL: no decay.
    epsilon_decay_visits double precision,
    visit                text NOT NULL CHECK (visit IN ('first', 'every')),
    initial_q            double precision NOT NULL,
    -- Bumped by every committed training batch; Q rows carry the revision
    -- that last wrote them so readers can fetch only what changed.
    revision             bigint NOT NULL DEFAULT 0,
    created_at           timestamptz NOT NULL DEFAULT now(),
    updated_at           timestamptz NOT NULL DEFAULT now()
);

-- Arrival order across all policies; COPY fills it per row.
CREATE SEQUENCE episode_seq;

-- No foreign key to policies: the per-row check would cost more than the
-- rest of an episode COPY, and policies are never deleted by the service.
CREATE TABLE episodes (
    policy_id     integer NOT NULL,
    seq           bigint NOT NULL DEFAULT nextval('episode_seq'),
    episode_id    text NOT NULL,
    received_at   timestamptz NOT NULL DEFAULT now(),
    trained_at    timestamptz,
    states        text[] NOT NULL,
    -- Indexes into policies.actions, which cannot change once episodes exist.
    actions       smallint[] NOT NULL,
    rewards       double precision[] NOT NULL,
    -- Behaviour probabilities per step, 0 where the client gave none;
    -- NULL when no step had one.
    probabilities double precision[],
    PRIMARY KEY (policy_id, seq),
    UNIQUE (policy_id, episode_id)
);

CREATE INDEX episodes_untrained ON episodes (policy_id, seq) WHERE trained_at IS NULL;

CREATE TABLE q_values (
    policy_id  integer NOT NULL,
    state      text NOT NULL,
    action     smallint NOT NULL,
    q          double precision NOT NULL,
    visits     bigint NOT NULL,
    -- Signed size of the last update, alpha * (G - Q), and when it happened.
    last_delta double precision NOT NULL,
    updated_at timestamptz NOT NULL,
    revision   bigint NOT NULL,
    PRIMARY KEY (policy_id, state, action)
);

CREATE INDEX q_values_revision ON q_values (policy_id, revision);

-- +goose Down
DROP TABLE q_values;
DROP TABLE episodes;
DROP SEQUENCE episode_seq;
DROP TABLE policies;
