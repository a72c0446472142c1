-- pollard's PostgreSQL store, version 1. Applied once, at start, under an advisory lock
-- (src/store/postgres/migrate.rs). Each record column holds the same versioned bytes the
-- sled store keeps (src/store/records.rs: a format byte, then JSON); the other columns
-- are what queries filter, order, lock and join on. Ids compare byte by byte (COLLATE "C"):
-- run and schedule ids are time-ordered, and their order is creation order.

CREATE TABLE datasets (
    id          text COLLATE "C" PRIMARY KEY,
    name        text COLLATE "C" NOT NULL,
    version     bigint NOT NULL,
    created_at  bigint NOT NULL,
    record      bytea NOT NULL
);
CREATE INDEX datasets_by_name ON datasets (name, version);

-- Every version ever given under a name; dataset_id is NULL once that version was deleted,
-- so versions under a name only grow.
CREATE TABLE dataset_versions (
    name        text COLLATE "C" NOT NULL,
    version     bigint NOT NULL,
    dataset_id  text COLLATE "C",
    PRIMARY KEY (name, version)
);

-- A dataset's bytes, in chunks of 1 MiB numbered from 0.
CREATE TABLE dataset_chunks (
    dataset_id  text COLLATE "C" NOT NULL REFERENCES datasets (id) ON DELETE CASCADE,
    index       integer NOT NULL,
    bytes       bytea NOT NULL,
    PRIMARY KEY (dataset_id, index)
);

-- The queue is the runs in state 'queued', oldest id first; the runs holding a dataset are
-- its queued and running runs; its reference count is the number of its runs.
CREATE TABLE runs (
    id          text COLLATE "C" PRIMARY KEY,
    state       text NOT NULL,
    dataset_id  text COLLATE "C" NOT NULL,
    owner       text COLLATE "C",
    record      bytea NOT NULL
);
CREATE INDEX runs_queued ON runs (id) WHERE state = 'queued';
CREATE INDEX runs_running ON runs (id) WHERE state = 'running';
CREATE INDEX runs_by_dataset ON runs (dataset_id, id);

-- keys::idempotency(owner, key) -> the run it started.
CREATE TABLE idempotency_keys (
    key         bytea PRIMARY KEY,
    run_id      text COLLATE "C" NOT NULL
);

CREATE TABLE events (
    run_id      text COLLATE "C" NOT NULL,
    sequence    bigint NOT NULL,
    at          bigint NOT NULL,
    record      bytea NOT NULL,
    PRIMARY KEY (run_id, sequence)
);

-- A unit's result is written once (the primary key refuses a second writer); worker names
-- the process that computed it.
CREATE TABLE units (
    run_id      text COLLATE "C" NOT NULL,
    unit        bigint NOT NULL,
    worker      text NOT NULL,
    record      bytea NOT NULL,
    PRIMARY KEY (run_id, unit)
);

CREATE TABLE outcomes (
    run_id      text COLLATE "C" PRIMARY KEY,
    record      bytea NOT NULL
);

CREATE TABLE schedules (
    id          text COLLATE "C" PRIMARY KEY,
    record      bytea NOT NULL
);

CREATE TABLE fires (
    schedule_id text COLLATE "C" NOT NULL,
    sequence    bigint NOT NULL,
    record      bytea NOT NULL,
    PRIMARY KEY (schedule_id, sequence)
);
