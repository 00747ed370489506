-- foldfarm results store, schema version 1.
--
-- The same tables as foldfarm/store/models.py, as DDL that runs unchanged on
-- SQLite (3.35+) and PostgreSQL (12+), one statement at a time, on an empty
-- database (or PostgreSQL schema).  foldfarm creates these tables itself on
-- first use; this file is for people who prepare a database by hand and for
-- anyone querying results with sqlite3 or psql.
--
-- Conventions
--   * Times are UTC, without a time zone.
--   * Ids are allocated by foldfarm from id_counters, not by the database
--     (SQLite and PostgreSQL share no auto-increment syntax).
--   * A task is named within its run by its prefix: '/' is the whole search
--     tree, '/1/2/4' the subtree below the choices 1, 2, 4.
--   * Foldings counted so far in a run =
--         sum(count) over tasks in state 'done' or 'split'
--     (a split task's count is the partial count it made before its budget
--     ran out; its remainder children cover the rest of its subtree).
--   * An exact run total may exceed 64 bits, so runs.total is decimal text.
--
-- Example (either shell):
--   SELECT state, COUNT(*) FROM tasks WHERE run_id = 1 GROUP BY state;
--   SELECT prefix, seconds FROM tasks WHERE run_id = 1 ORDER BY seconds DESC LIMIT 10;


-- One count of one map shape.
CREATE TABLE runs (
    id            BIGINT        NOT NULL PRIMARY KEY,
    shape         VARCHAR(64)   NOT NULL,   -- canonical shape text, e.g. '3x8'
    side_order    VARCHAR(64)   NOT NULL,   -- order of sides the search used, e.g. '8x3'
    state         VARCHAR(16)   NOT NULL,   -- planned, running, stopped, done, verified, suspect
    settings      TEXT          NOT NULL,   -- JSON object: task budget, audit fraction, ...
    created_at    TIMESTAMP     NOT NULL,
    finished_at   TIMESTAMP,
    total         VARCHAR(64),              -- exact final count as decimal digits; NULL until done
    verification  VARCHAR(16)   NOT NULL,   -- unchecked, passed, failed
    certificate   VARCHAR(128),             -- digest of the run's result certificate
    checks        TEXT,                     -- JSON object: outcome of the checks
    CONSTRAINT ck_runs_state CHECK (state IN ('planned', 'running', 'stopped', 'done', 'verified', 'suspect')),
    CONSTRAINT ck_runs_verification CHECK (verification IN ('unchecked', 'passed', 'failed')),
    CONSTRAINT ck_runs_total_digits CHECK (total IS NULL OR (LENGTH(total) BETWEEN 1 AND 64 AND TRIM(total, '0123456789') = '' AND (total = '0' OR SUBSTR(total, 1, 1) <> '0')))
);

-- One subtree of a run's search tree.
--   pending -> running -> done             (count = exact count of the subtree)
--                      -> split            (count = partial count; children are new pending tasks)
--                      -> failed -> running ...
CREATE TABLE tasks (
    id            BIGINT        NOT NULL PRIMARY KEY,
    run_id        BIGINT        NOT NULL REFERENCES runs (id),
    prefix        TEXT          NOT NULL,   -- '/' or '/a/b/...'
    depth         INTEGER       NOT NULL,   -- number of prefix components
    branch        INTEGER,                  -- first prefix component; NULL for '/'
    parent_id     BIGINT        REFERENCES tasks (id),  -- the split task this one is a remainder of
    state         VARCHAR(8)    NOT NULL,   -- pending, running, done, split, failed
    count         BIGINT,                   -- foldings counted (done: all; split: partial); NULL while open
    nodes         BIGINT,                   -- search-tree nodes visited
    seconds       DOUBLE PRECISION,         -- wall-clock seconds of the recorded attempt on one core
    attempts      INTEGER       NOT NULL,   -- times the task was handed to a worker
    worker        VARCHAR(256),             -- address of the worker of the last attempt
    error         TEXT,                     -- last failure message
    created_at    TIMESTAMP     NOT NULL,
    started_at    TIMESTAMP,
    finished_at   TIMESTAMP,
    CONSTRAINT uq_tasks_run_prefix UNIQUE (run_id, prefix),
    CONSTRAINT ck_tasks_state CHECK (state IN ('pending', 'running', 'done', 'split', 'failed')),
    CONSTRAINT ck_tasks_count_present CHECK ((state IN ('done', 'split') AND count IS NOT NULL) OR (state IN ('pending', 'running', 'failed') AND count IS NULL)),
    CONSTRAINT ck_tasks_nonnegative CHECK (count >= 0 AND nodes >= 0 AND depth >= 0 AND attempts >= 0)
);

-- Next pending tasks of a run, tasks by state.
CREATE INDEX ix_tasks_run_state ON tasks (run_id, state, id);

-- Remainder children of a split task.
CREATE INDEX ix_tasks_parent ON tasks (parent_id);

-- A second computation of a done task, and whether it agreed.
CREATE TABLE audits (
    id            BIGINT        NOT NULL PRIMARY KEY,
    task_id       BIGINT        NOT NULL REFERENCES tasks (id),
    count         BIGINT        NOT NULL,
    nodes         BIGINT,
    seconds       DOUBLE PRECISION,
    worker        VARCHAR(256),
    audited_at    TIMESTAMP     NOT NULL,
    matched       BOOLEAN       NOT NULL,   -- count equals the task's recorded count
    CONSTRAINT ck_audits_nonnegative CHECK (count >= 0 AND nodes >= 0)
);

CREATE INDEX ix_audits_task ON audits (task_id);

-- The one driver allowed to run a run: live while now - heartbeat_at <= the driver's TTL.
CREATE TABLE leases (
    run_id        BIGINT        NOT NULL PRIMARY KEY REFERENCES runs (id),
    holder        VARCHAR(256)  NOT NULL,   -- e.g. 'host:pid'
    acquired_at   TIMESTAMP     NOT NULL,
    heartbeat_at  TIMESTAMP     NOT NULL
);

-- Facts about the store; foldfarm refuses a store whose schema_version it does not know.
CREATE TABLE meta (
    name          VARCHAR(64)   NOT NULL PRIMARY KEY,
    value         VARCHAR(256)  NOT NULL
);

-- Next free id per table.
CREATE TABLE id_counters (
    name          VARCHAR(16)   NOT NULL PRIMARY KEY,
    next_id       BIGINT        NOT NULL
);

INSERT INTO meta (name, value) VALUES ('schema_version', '1');
INSERT INTO id_counters (name, next_id) VALUES ('audits', 1);
INSERT INTO id_counters (name, next_id) VALUES ('runs', 1);
INSERT INTO id_counters (name, next_id) VALUES ('tasks', 1);
