-- When a patient became dirty, on the database's clock (since_at), beside
-- since_ns, the time the writing replica gave by its own clock. Every
-- listing of marks says how long each has waited by the database's clock
-- (store.Dirty.Waited), so the settle delay does not depend on the
-- replicas' clocks agreeing: a replica whose clock runs ahead of the one
-- that took the data in would otherwise find the mark old at once. A mark
-- written before this migration, or by a replica of an earlier build,
-- has none (NULL), and its wait is measured from since_ns as before.
ALTER TABLE dirty ADD COLUMN since_at timestamptz;

-- When a rescheduled write's next attempt is due, on the database's clock
-- (due_at), beside not_before_ns, the time the rescheduling replica gave
-- by its own clock: DueWrites says how long each write still waits by the
-- database's clock (store.Write.Wait), so a backoff or a server's
-- Retry-After lasts as long on a replica whose clock disagrees with the
-- one that set it. NULL for a write never rescheduled this way (queued,
-- retried from the dead letters, rescheduled by an earlier build): its
-- wait is measured from not_before_ns.
ALTER TABLE outbox ADD COLUMN due_at timestamptz;
