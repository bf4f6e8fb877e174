-- +goose Up
-- What a policy guards against. When greedy may stand behind an action: how often it must have been
-- tried in the state, whether an untried action may compete with its
-- initial value, and the action greedy answers where nothing is tried
-- enough (NULL: no answer).
ALTER TABLE policies
    ADD COLUMN greedy_min_visits bigint NOT NULL DEFAULT 0 CHECK (greedy_min_visits >= 0),
    ADD COLUMN greedy_untried boolean NOT NULL DEFAULT false,
    ADD COLUMN greedy_fallback text,
    -- The form every state must have ({"separator", "fields": [{"name",
    -- "values"} or {"name", "min", "max"}]}); NULL: any state.
    ADD COLUMN state_shape jsonb,
    -- Refuse steps without a behaviour probability.
    ADD COLUMN require_probability boolean NOT NULL DEFAULT false;

-- +goose Down
ALTER TABLE policies
    DROP COLUMN require_probability,
    DROP COLUMN state_shape,
    DROP COLUMN greedy_fallback,
    DROP COLUMN greedy_untried,
    DROP COLUMN greedy_min_visits;
