-- +goose Up
-- The set of actions each step was chosen from, so that evaluation can
-- compute a target's probabilities among the same actions. One bitmask a
-- step over the policy's action indexes (bit i % 8 of byte i / 8 of the
-- step's slice is action i), ceil(actions / 8) bytes a step, concatenated;
-- a step without a set is all zero (a set is never empty). NULL when no
-- step had a set, which is what every episode stored before means: no set.
-- Adding a nullable column without a default rewrites no rows.
ALTER TABLE episodes ADD COLUMN allowed bytea;

-- +goose Down
ALTER TABLE episodes DROP COLUMN allowed;
