-- The generation of the dirty mark that each patient's last committed
-- evaluation cleared, on whichever replica. A replica keeps what one
-- evaluation of a patient found for the next (the fall detector's state)
-- only while this is still what it was when that evaluation committed:
-- an evaluation on another replica in between, of changes this one never
-- saw, moves it. One small row a patient, like the patient's facts.
CREATE TABLE cleared (
    subject    text COLLATE "C" PRIMARY KEY,
    generation bigint NOT NULL
);

-- Recorded by a trigger, not by the commit's own statement, so that a
-- replica of an earlier build, still running while the replicas are
-- upgraded one at a time, records its clears too.
CREATE FUNCTION record_clear() RETURNS trigger LANGUAGE plpgsql AS $$
BEGIN
    INSERT INTO cleared (subject, generation) VALUES (OLD.subject, OLD.generation)
    ON CONFLICT (subject) DO UPDATE SET generation = EXCLUDED.generation;
    RETURN NULL;
END
$$;

CREATE TRIGGER dirty_cleared AFTER DELETE ON dirty FOR EACH ROW EXECUTE FUNCTION record_clear();
