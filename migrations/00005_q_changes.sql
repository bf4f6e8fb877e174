-- +goose Up
-- Each training batch records which pairs it changed, so that API processes
-- find what changed since their copy's revision without an index on
-- q_values.revision. That index made every Q update a non-HOT update (a new
-- entry in every index, the primary key's included); without it, and with
-- room left on each page, an update stays on its page.
CREATE TABLE q_changes (
    policy_id integer NOT NULL,
    revision  bigint NOT NULL,
    states    text[] NOT NULL,
    actions   smallint[] NOT NULL,
    PRIMARY KEY (policy_id, revision)
);

DROP INDEX q_values_revision;
ALTER TABLE q_values SET (fillfactor = 75);

-- +goose Down
ALTER TABLE q_values RESET (fillfactor);
CREATE INDEX q_values_revision ON q_values (policy_id, revision);
DROP TABLE q_changes;
