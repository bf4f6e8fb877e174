-- +goose Up
-- Every recorded decision updates its open episode's row (steps and
-- last_active_at). With last_active_at indexed, none of those updates could
-- be HOT: each added entries to all three indexes, and the key lookups of
-- the next decisions walked the dead versions (1024 episodes after 64,000
-- decisions: 1.9 MB of table for 1024 live rows, 0 HOT updates). Without
-- that index and with room left in each page, an update stays on its page
-- and old versions are pruned as pages are read. The idle sweep and the
-- oldest-activity figure read a policy's open episodes instead, at most
-- max_open_episodes rows.
DROP INDEX open_episodes_idle;
ALTER TABLE open_episodes SET (fillfactor = 50);

-- +goose Down
ALTER TABLE open_episodes RESET (fillfactor);
CREATE INDEX open_episodes_idle ON open_episodes (policy_id, last_active_at);
