-- +goose Up
-- When greedy may stand behind an action: how often it must have been
-- tried in the state, whether an untried action may compete with its
-- initial value, and the action greedy answers where nothing is tried
-- enough (NULL: no answer).
ALTER TABLE policies
    ADD COLUMN greedy_min_visits bigint NOT NULL DEFAULT 0 CHECK (greedy_min_visits >= 0),
    ADD COLUMN greedy_untried boolean NOT NULL DEFAULT false,
    ADD COLUMN greedy_fallback text;

-- +goose Down
ALTER TABLE policies
    DROP COLUMN greedy_fallback,
    DROP COLUMN greedy_untried,
    DROP COLUMN greedy_min_visits;
