-- +goose Up
-- Episodes qtally keeps open for the application: each choose that names
-- an episode records its decision here, durably, before it answers; rewards
-- are added as they happen; ending the episode moves it into episodes (as
-- one row, under the same per-policy lock that posting takes, so that the
-- order episodes end is their training order) and deletes it here.

-- What a policy does with open episodes. idle limit 0: never idle.
ALTER TABLE policies
    ADD COLUMN open_episode_idle_limit double precision NOT NULL DEFAULT 0,
    ADD COLUMN on_idle text NOT NULL DEFAULT 'end' CHECK (on_idle IN ('end', 'drop')),
    ADD COLUMN max_open_episodes integer NOT NULL DEFAULT 100000,
    ADD COLUMN max_open_episode_steps integer NOT NULL DEFAULT 1000;

CREATE TABLE open_episodes (
    policy_id      integer NOT NULL,
    episode_id     text NOT NULL,
    opened_at      timestamptz NOT NULL DEFAULT now(),
    -- The last decision or reward: idleness counts from here.
    last_active_at timestamptz NOT NULL DEFAULT now(),
    -- Decisions recorded; the next one is step number steps (from 0).
    steps          integer NOT NULL,
    PRIMARY KEY (policy_id, episode_id)
);

CREATE INDEX open_episodes_idle ON open_episodes (policy_id, last_active_at);
CREATE INDEX open_episodes_age ON open_episodes (policy_id, opened_at);

-- One recorded decision, with everything its answer said, so that a retry
-- is answered the same and the ended episode carries what evaluation needs.
CREATE TABLE open_episode_steps (
    policy_id     integer NOT NULL,
    episode_id    text NOT NULL,
    step          integer NOT NULL,
    state         text NOT NULL,
    -- Indexes into policies.actions, as in episodes.
    action        smallint NOT NULL,
    greedy_action smallint NOT NULL,
    probability   double precision NOT NULL,
    -- The set the action was chosen from, as episodes.allowed encodes one step.
    allowed       bytea NOT NULL,
    mode          text NOT NULL,
    explored      boolean NOT NULL,
    known_state   boolean NOT NULL,
    revision      bigint NOT NULL,
    copy_age      double precision NOT NULL,
    chosen_at     timestamptz NOT NULL DEFAULT now(),
    -- Sum of the rewards added to this step so far.
    reward        double precision NOT NULL DEFAULT 0,
    PRIMARY KEY (policy_id, episode_id, step)
);

-- Reward additions that carried a key of the client's: a retry with the
-- same key adds nothing.
CREATE TABLE open_episode_reward_keys (
    policy_id  integer NOT NULL,
    episode_id text NOT NULL,
    key        text NOT NULL,
    step       integer NOT NULL,
    PRIMARY KEY (policy_id, episode_id, key)
);

-- Per-policy counts: how many are open (for the limit, without counting
-- rows) and how many ended which way; a policy's figure is the sum of its
-- rows. Batches that open episodes run concurrently, and each adds to a
-- shard of its own choosing, so that they do not queue for one row.
CREATE TABLE open_episode_counts (
    policy_id  integer NOT NULL,
    shard      smallint NOT NULL,
    open       bigint NOT NULL DEFAULT 0,
    ended      bigint NOT NULL DEFAULT 0,
    ended_idle bigint NOT NULL DEFAULT 0,
    dropped    bigint NOT NULL DEFAULT 0,
    PRIMARY KEY (policy_id, shard)
);

-- +goose Down
DROP TABLE open_episode_counts;
DROP TABLE open_episode_reward_keys;
DROP TABLE open_episode_steps;
DROP TABLE open_episodes;
ALTER TABLE policies
    DROP COLUMN open_episode_idle_limit,
    DROP COLUMN on_idle,
    DROP COLUMN max_open_episodes,
    DROP COLUMN max_open_episode_steps;
