-- +goose Up
-- API tokens. Only a keyed digest of each secret is stored; the secret is
-- shown once when the token is created. This small table is read whole by
-- every API process, so unlike the per-policy tables it is keyed by token:
-- distributed by policy, it would be copied to every node.
CREATE TABLE api_tokens (
    token_id        bigint GENERATED ALWAYS AS IDENTITY PRIMARY KEY,
    -- What the token is for, as its creator describes it.
    label           text NOT NULL,
    -- HMAC-SHA-256 of the secret's random part under the server's pepper.
    digest          bytea NOT NULL,
    scopes          text[] NOT NULL,
    -- The only policies the token may act on; NULL: every policy.
    policies        text[],
    -- Per-token request rate; NULL: the server's default.
    rate_per_second double precision,
    burst           integer,
    created_at      timestamptz NOT NULL DEFAULT now(),
    revoked_at      timestamptz
);

-- +goose Down
DROP TABLE api_tokens;
