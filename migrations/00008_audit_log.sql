-- +goose Up
-- Every admin action: who (an API token, or the command line, which acts
-- with database credentials), what, on which policy, when, and how it
-- ended. Rows are only ever added. Like api_tokens this table is keyed by
-- its own id rather than by policy: some actions (token create and revoke,
-- listing every policy) belong to no policy.
CREATE TABLE audit_log (
    audit_id       bigint GENERATED ALWAYS AS IDENTITY PRIMARY KEY,
    at             timestamptz NOT NULL DEFAULT now(),
    via            text NOT NULL CHECK (via IN ('api', 'command line')),
    -- The token the request carried; NULL from the command line, and from
    -- an API that runs without tokens (--no-auth).
    token_id       bigint,
    token_label    text NOT NULL,
    -- The HTTP method and route pattern, or the command.
    method         text NOT NULL,
    route          text NOT NULL,
    -- The request's path and query as sent (empty from the command line).
    path           text NOT NULL,
    -- The policy of the path, if any, and every policy the request named
    -- (path, query and body).
    policy         text,
    policies_named text[] NOT NULL DEFAULT '{}',
    -- What the action created or changed when that is not the path: the
    -- Location of a new object, or "token <id>".
    object         text,
    -- The HTTP status of the answer; 200 or 201 for a command that succeeded.
    status         integer NOT NULL
);

CREATE INDEX audit_log_policy ON audit_log (policy, audit_id);

-- +goose Down
DROP TABLE audit_log;
