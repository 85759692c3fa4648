-- Which replicas are running: each renews its row while it runs and
-- deletes it when it stops. A patient is left to the replica that
-- evaluated it last (cleared.holder) only while that replica is here, so
-- a replica that stopped or died hands its patients over at once, and a
-- restarted one (a new name) does not wait for its own earlier self.
CREATE TABLE replicas_alive (
    holder      text COLLATE "C" PRIMARY KEY,
    alive_until timestamptz NOT NULL
);
