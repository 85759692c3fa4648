-- A mark's until_ns says until which blood gas sample time its changes can
-- alter results (0: no end), as this build works it out (each kind's reach
-- the other way). Builds before this one do not keep it, and replicas of
-- them go on writing while the replicas are upgraded one at a time: a mark
-- this build writes carries its generation in end_generation too, a write
-- by an earlier build moves the generation and leaves end_generation
-- behind, and the mark is then read as having no end.
ALTER TABLE dirty ADD COLUMN until_ns bigint NOT NULL DEFAULT 0;
ALTER TABLE dirty ADD COLUMN end_generation bigint NOT NULL DEFAULT 0;
