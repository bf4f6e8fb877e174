-- +goose Up
-- Every change of a policy's settings: which fields, their old and new
-- values, which token made it and when. Written in the transaction of the
-- change itself, so the history never misses one.
CREATE TABLE settings_changes (
    policy_id   integer NOT NULL,
    change_id   bigint GENERATED ALWAYS AS IDENTITY,
    changed_at  timestamptz NOT NULL DEFAULT now(),
    kind        text NOT NULL CHECK (kind IN ('create', 'replace', 'patch')),
    -- The token that made the change; NULL when authentication was off.
    -- The label is copied: a revoked token's changes keep their author.
    token_id    bigint,
    token_label text,
    -- [{"field": ..., "old": ..., "new": ...}], null for unset.
    fields      jsonb NOT NULL,
    PRIMARY KEY (policy_id, change_id)
);

-- +goose Down
DROP TABLE settings_changes;
