-- Work claimed unit by unit. A running run's plan puts one row per work unit (fold ×
-- shaping key) here, once, when the run is first planned; a replica claims a few rows at a
-- time with FOR UPDATE SKIP LOCKED, setting owner and expires_at (milliseconds since the
-- epoch, by the database's clock) and renewing expires_at while it computes them. A row
-- whose lease expired is claimed again by another replica. The row goes when the unit's
-- result is stored (in the same transaction).
CREATE TABLE unit_claims (
    run_id      text COLLATE "C" NOT NULL,
    unit        bigint NOT NULL,
    owner       text,
    expires_at  bigint NOT NULL DEFAULT 0,
    PRIMARY KEY (run_id, unit)
);
CREATE INDEX unit_claims_by_owner ON unit_claims (owner) WHERE owner IS NOT NULL;

-- The order units were stored in, per run (1, 2, …; given inside the storing transaction,
-- which holds the run's row): a replica learns the units others stored since it last looked.
ALTER TABLE units ADD COLUMN stored_seq bigint;
CREATE INDEX units_by_stored_seq ON units (run_id, stored_seq);
