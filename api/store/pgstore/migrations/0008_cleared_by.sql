-- Which replica's evaluation cleared each patient's last mark (its claim,
-- the mark's claimed_by when the mark is deleted; '' when unknown). That
-- replica holds what the evaluation found (the fall detector's state and
-- the patient's falls), so the other replicas leave the patient's next
-- mark to it for a moment before they take it. Recorded by the same
-- trigger as the generation, so clears by replicas of an earlier build
-- count too.
ALTER TABLE cleared ADD COLUMN holder text NOT NULL DEFAULT '';

CREATE OR REPLACE FUNCTION record_clear() RETURNS trigger LANGUAGE plpgsql AS $$
BEGIN
    INSERT INTO cleared (subject, generation, holder) VALUES (OLD.subject, OLD.generation, COALESCE(OLD.claimed_by, ''))
    ON CONFLICT (subject) DO UPDATE SET generation = EXCLUDED.generation, holder = EXCLUDED.holder;
    RETURN NULL;
END
$$;

-- CREATE OR REPLACE drops the path migration 0005 gave the function.
ALTER FUNCTION record_clear() SET search_path FROM CURRENT;
