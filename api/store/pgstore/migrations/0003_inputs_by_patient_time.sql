-- A patient's inputs in the order Inputs and InputsFrom return them
-- (effective time, then logical reference): a read from a time on scans
-- only the patient's rows from that time, in order, however long the
-- retained history before it. inputs_by_effective stays for Prune, which
-- looks across patients.
CREATE INDEX inputs_by_subject_effective ON inputs (subject, effective_ns, logical);
