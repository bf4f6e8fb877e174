-- +goose Up
-- Bumped by every restore or import: readers that hold a copy of the Q
-- table reload it whole, because rows that no longer exist leave no trace
-- in the revision-ordered change feed.
ALTER TABLE policies ADD COLUMN table_epoch bigint NOT NULL DEFAULT 0;

-- A frozen copy of a policy's Q table. The actions and initial value are
-- kept so the copy keeps its meaning if the policy's settings change.
CREATE TABLE snapshots (
    policy_id   integer NOT NULL,
    snapshot_id bigint GENERATED ALWAYS AS IDENTITY,
    name        text NOT NULL,
    created_at  timestamptz NOT NULL DEFAULT now(),
    -- The policy's revision when the table was frozen.
    revision    bigint NOT NULL,
    actions     text[] NOT NULL,
    initial_q   double precision NOT NULL,
    states      bigint NOT NULL,
    pairs       bigint NOT NULL,
    PRIMARY KEY (policy_id, snapshot_id),
    UNIQUE (policy_id, name)
);

CREATE TABLE snapshot_values (
    policy_id   integer NOT NULL,
    snapshot_id bigint NOT NULL,
    state       text NOT NULL,
    action      smallint NOT NULL,
    q           double precision NOT NULL,
    visits      bigint NOT NULL,
    last_delta  double precision NOT NULL,
    updated_at  timestamptz NOT NULL,
    PRIMARY KEY (policy_id, snapshot_id, state, action)
);

-- Background work (evaluations, replays) with its progress and result, so
-- that any API process can answer for a job another process runs.
CREATE TABLE jobs (
    policy_id    integer NOT NULL,
    job_id       bigint GENERATED ALWAYS AS IDENTITY,
    kind         text NOT NULL CHECK (kind IN ('evaluation', 'replay')),
    status       text NOT NULL DEFAULT 'queued' CHECK (status IN ('queued', 'running', 'succeeded', 'failed')),
    -- The job document: the request as normalised and resolved when posted.
    spec         jsonb NOT NULL,
    progress     jsonb NOT NULL DEFAULT '{"phase": "queued", "done": 0, "total": 0}',
    result       jsonb,
    error        text,
    -- Claims so far; a job whose runner stopped heartbeating is claimed again.
    attempts     integer NOT NULL DEFAULT 0,
    created_at   timestamptz NOT NULL DEFAULT now(),
    started_at   timestamptz,
    heartbeat_at timestamptz,
    finished_at  timestamptz,
    PRIMARY KEY (policy_id, job_id)
);

CREATE INDEX jobs_open ON jobs (policy_id, job_id) WHERE status IN ('queued', 'running');

-- +goose Down
DROP TABLE jobs;
DROP TABLE snapshot_values;
DROP TABLE snapshots;
ALTER TABLE policies DROP COLUMN table_epoch;
