-- The service's state (package store): inputs, patient facts, the ledger of
-- derivations, the outbox, dead letters, cursors, subscription counters and
-- the feed. Text keys use the "C" collation so that every listing comes
-- back in byte order, as the embedded store gives it, whatever the
-- database's locale.

-- Migration 0001 made the coordination tables; as released, their keys sort
-- by the database's locale. Byte order, like every key here.
ALTER TABLE leases ALTER COLUMN name TYPE text COLLATE "C";
ALTER TABLE dirty ALTER COLUMN subject TYPE text COLLATE "C";

-- A dirty mark says from which physiological time results can change
-- (from_ns; 0: the whole patient) and whether a blood gas arrived (urgent:
-- evaluated first). A mark that already covers the whole patient stays so
-- until an evaluation clears it.
ALTER TABLE dirty ADD COLUMN from_ns bigint NOT NULL DEFAULT 0;
ALTER TABLE dirty ADD COLUMN urgent boolean NOT NULL DEFAULT false;
DROP INDEX dirty_by_since;
CREATE INDEX dirty_by_urgency ON dirty (urgent DESC, since_ns, subject);

-- The latest version of each input, filed under its patient.
CREATE TABLE inputs (
    subject         text COLLATE "C" NOT NULL,
    logical         text COLLATE "C" NOT NULL,
    version_id      text   NOT NULL,
    last_updated_ns bigint NOT NULL,
    effective_ns    bigint NOT NULL,
    payload         bytea  NOT NULL,
    PRIMARY KEY (subject, logical)
);
CREATE INDEX inputs_by_effective ON inputs (effective_ns);

-- Which patient the latest stored version of an input names.
CREATE TABLE input_owner (
    logical text COLLATE "C" PRIMARY KEY,
    subject text COLLATE "C" NOT NULL
);

CREATE TABLE patients (
    subject         text COLLATE "C" PRIMARY KEY,
    version_id      text   NOT NULL,
    last_updated_ns bigint NOT NULL,
    fetched_at_ns   bigint NOT NULL,
    payload         bytea  NOT NULL
);

-- One row per derived series; revisions are the previous keys, oldest
-- first.
CREATE TABLE ledger (
    series         text COLLATE "C" PRIMARY KEY,
    subject        text COLLATE "C" NOT NULL,
    key            text   NOT NULL,
    status         text   NOT NULL,
    server_id      text   NOT NULL DEFAULT '',
    server_version text   NOT NULL DEFAULT '',
    revisions      text[] NOT NULL DEFAULT '{}',
    effective_ns   bigint NOT NULL,
    updated_ns     bigint NOT NULL,
    payload        bytea  NOT NULL
);
CREATE INDEX ledger_by_subject ON ledger (subject, series);
CREATE INDEX ledger_by_time ON ledger (subject, effective_ns, series);
CREATE INDEX ledger_by_effective ON ledger (effective_ns);

-- Each entry as it stood under a key it no longer has, for explaining a
-- value that has since been superseded.
CREATE TABLE ledger_versions (
    key            text COLLATE "C" PRIMARY KEY,
    series         text COLLATE "C" NOT NULL,
    subject        text COLLATE "C" NOT NULL,
    status         text   NOT NULL,
    server_id      text   NOT NULL,
    server_version text   NOT NULL,
    revisions      text[] NOT NULL,
    effective_ns   bigint NOT NULL,
    updated_ns     bigint NOT NULL,
    payload        bytea  NOT NULL
);
CREATE INDEX ledger_versions_by_series ON ledger_versions (series);

-- One derivation (or fall finding) per version, shared by the entries of
-- its values.
CREATE TABLE results (
    id           text COLLATE "C" NOT NULL,
    version      text COLLATE "C" NOT NULL,
    subject      text COLLATE "C" NOT NULL,
    effective_ns bigint NOT NULL,
    payload      bytea  NOT NULL,
    PRIMARY KEY (id, version)
);
CREATE INDEX results_by_effective ON results (effective_ns);

-- Every key a series has had, current and previous.
CREATE TABLE ledger_keys (
    key    text COLLATE "C" PRIMARY KEY,
    series text COLLATE "C" NOT NULL
);

-- Writes the FHIR server has not acknowledged. claimed_by/claim_expires
-- mark the replica sending a write (DueWrites claims with SKIP LOCKED); a
-- claim past its expiry is free again, so a write whose replica died is
-- sent by another after the lease.
CREATE TABLE outbox (
    id            bigint GENERATED ALWAYS AS IDENTITY PRIMARY KEY,
    subject       text COLLATE "C" NOT NULL,
    series        text[] NOT NULL,
    body          bytea  NOT NULL,
    attempts      integer NOT NULL DEFAULT 0,
    not_before_ns bigint NOT NULL,
    created_ns    bigint NOT NULL,
    last_error    text   NOT NULL DEFAULT '',
    claimed_by    text,
    claim_expires timestamptz
);
CREATE INDEX outbox_by_not_before ON outbox (not_before_ns, id);
-- Writes of one series go in order: DueWrites looks for earlier ones.
CREATE INDEX outbox_by_series ON outbox USING gin (series);

-- Writes the server refused for good, in burial order.
CREATE TABLE dead_letters (
    seq           bigint GENERATED ALWAYS AS IDENTITY PRIMARY KEY,
    write_id      bigint NOT NULL,
    subject       text COLLATE "C" NOT NULL,
    series        text[] NOT NULL,
    body          bytea  NOT NULL,
    attempts      integer NOT NULL,
    not_before_ns bigint NOT NULL,
    created_ns    bigint NOT NULL,
    last_error    text   NOT NULL,
    reason        text   NOT NULL,
    at_ns         bigint NOT NULL
);
CREATE INDEX dead_letters_by_time ON dead_letters (at_ns);

CREATE TABLE cursors (
    name  text COLLATE "C" PRIMARY KEY,
    value text NOT NULL
);

-- The highest event number seen per subscription; numeric holds every
-- uint64.
CREATE TABLE subscription_events (
    subscription text COLLATE "C" PRIMARY KEY,
    highest      numeric(20) NOT NULL
);

-- The derivation feed. seq comes from the single row of feed_head, which
-- a commit updates last and holds until it ends: commits append to the
-- feed one at a time, so a seq is visible only after every smaller one,
-- and a watcher resuming from a seq never skips an event committed late.
CREATE TABLE feed (
    seq     bigint PRIMARY KEY,
    series  text COLLATE "C" NOT NULL,
    subject text COLLATE "C" NOT NULL,
    key     text NOT NULL,
    status  text NOT NULL,
    at_ns   bigint NOT NULL
);
CREATE INDEX feed_by_time ON feed (at_ns);
CREATE TABLE feed_head (
    only_row boolean PRIMARY KEY DEFAULT true CHECK (only_row),
    seq      bigint  NOT NULL
);
INSERT INTO feed_head (seq) VALUES (0);
