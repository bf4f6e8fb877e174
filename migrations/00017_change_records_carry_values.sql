-- +goose Up
-- A training batch's change record also carries the values it wrote, so
-- that an API process a few revisions behind reads them from the records
-- instead of looking every changed key up in q_values: under a mixed load
-- that join (some 30,000 keys a batch) was the longest part of the time
-- from a commit to choosing with it. Records written before this migration
-- carry none and are still read through q_values.
ALTER TABLE q_changes ADD COLUMN q double precision[], ADD COLUMN visits bigint[];

-- +goose Down
ALTER TABLE q_changes DROP COLUMN q, DROP COLUMN visits;
