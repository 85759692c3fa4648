-- A mark's from_ns says from which blood gas sample time its changes can
-- alter results, as this build works it out (the reach of each kind).
-- Builds before this one wrote the input's own time there, and replicas of
-- them go on writing while the replicas are upgraded one at a time. A
-- mark this build writes carries its generation in reach_generation too;
-- a write by an earlier build moves the generation and leaves
-- reach_generation behind, and the mark is then read as covering the
-- whole patient.
ALTER TABLE dirty ADD COLUMN reach_generation bigint NOT NULL DEFAULT 0;
