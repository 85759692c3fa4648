-- What lets several replicas share one database: named leases for the jobs
-- that run on one replica at a time, and the patients waiting for evaluation
-- with the replica (if any) that claimed each.

-- A lease is held by holder until expires_at (the database's clock, so the
-- replicas' clocks need not agree). epoch rises whenever the lease changes
-- hands: work done under an older epoch can be told apart (a fencing token).
CREATE TABLE leases (
    name       text        PRIMARY KEY,
    holder     text        NOT NULL,
    expires_at timestamptz NOT NULL,
    epoch      bigint      NOT NULL
);

-- Times the service passes in (effective, lastUpdated, now) are kept as
-- nanoseconds since 1970 in bigint columns named *_ns: timestamptz keeps
-- microseconds, and the store must give back exactly the instant it was
-- given. Times the database decides (lease and claim expiry) are
-- timestamptz.

-- A dirty patient has inputs that changed since its last evaluation.
-- generation rises with every change (from one sequence for all patients,
-- so a cleared mark never gets back a generation an evaluation in flight
-- holds). claimed_by/claim_expires mark the replica evaluating it; a claim
-- past its expiry is free again, so a patient whose replica died is taken
-- over.
CREATE SEQUENCE dirty_generation;
CREATE TABLE dirty (
    subject       text        PRIMARY KEY,
    since_ns      bigint      NOT NULL,
    generation    bigint      NOT NULL,
    claimed_by    text,
    claim_expires timestamptz
);
CREATE INDEX dirty_by_since ON dirty (since_ns, subject);
