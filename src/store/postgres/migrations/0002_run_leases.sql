-- Leases on running runs: the process executing a run (lease_owner, as recorded with the
-- units it stores) renews lease_expires (milliseconds since the epoch, by the database's
-- clock) while it works; a run whose lease expired lost its process, and another replica
-- takes it over, skipping the units already stored.
ALTER TABLE runs ADD COLUMN lease_owner text, ADD COLUMN lease_expires bigint;
CREATE INDEX runs_running_leases ON runs (lease_expires) WHERE state = 'running';
