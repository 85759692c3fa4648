-- The version kept of an input whose rows may be pruned before an older
-- version of it can no longer arrive: a version that replaced others is
-- kept until the latest of the effective times of the rows it replaced
-- and the time it arrived (until_ns), so a late copy of a version it
-- superseded is still refused after the newest version's row was pruned
-- (a correction that moved the sample time earlier, or the input to
-- another patient). Prune deletes rows whose until_ns is past the horizon.
-- A replica of an earlier build neither reads nor writes it: what it
-- stores is newer than what is kept here, as the rule needs.
CREATE TABLE input_kept (
    logical         text COLLATE "C" PRIMARY KEY,
    version_id      text   NOT NULL,
    last_updated_ns bigint NOT NULL,
    until_ns        bigint NOT NULL
);
CREATE INDEX input_kept_by_until ON input_kept (until_ns);
