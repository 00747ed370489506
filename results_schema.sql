-- foldfarm results store, schema version 2 (foldfarm upgrade turns a version 1 store into this).
--
-- The same tables as foldfarm/store/models.py, as DDL that runs unchanged on
-- SQLite (3.35+) and PostgreSQL (12+), one statement at a time, on an empty
-- database (or PostgreSQL schema).  foldfarm creates these tables itself on
-- first use; this file is for people who prepare a database by hand and for
-- anyone querying results with sqlite3 or psql.
--
-- Conventions
--   * Times are UTC, without a time zone.
--   * Ids are allocated by foldfarm, not by the database (SQLite and
--     PostgreSQL share no auto-increment syntax).  Runs and audits take theirs
--     from id_counters.  A run numbers its own tasks: task k of run r has the
--     id r * 10000000000 + k, and run_tallies.tasks_numbered of the run says
--     how many numbers it has handed out, in the same transaction as the
--     insert, so a number up to it that no task holds is a deleted task.  (A
--     store upgraded from version 1 keeps the ids of its older tasks, 1 up to
--     the meta row legacy_task_ids.)
--   * run_tallies holds, per run, the tasks in each state and the exact sums
--     below, kept by the transactions that change the tasks: what the runs
--     list and a run's progress read.
--   * A task is named within its run by its prefix: '/' is the whole search
--     tree, '/1/2/4' the subtree below the choices 1, 2, 4.
--   * Foldings counted so far in a run =
--         sum(count) over tasks in state 'done' or 'split'
--     (a split task's count is the partial count it made before its budget
--     ran out; its remainder children cover the rest of its subtree).
--   * An exact run total may exceed 64 bits, so runs.total is decimal text,
--     and so are the sums in run_tallies.
--
-- Example (either shell):
--   SELECT pending, running, done, split, failed, done_count, split_count FROM run_tallies WHERE run_id = 1;
--   SELECT prefix, seconds FROM tasks WHERE run_id = 1 AND seconds IS NOT NULL ORDER BY seconds DESC, id LIMIT 10;
--   SELECT prefix, state, count FROM tasks WHERE run_id = 1 ORDER BY sort_key;   -- tree order


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
    sort_key      TEXT          NOT NULL,   -- each step as 5 digits: '/1/2/10' is '000010000200010'; sorts in tree order
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
    CONSTRAINT uq_tasks_run_sort_key UNIQUE (run_id, sort_key),   -- one task per node (and tree order)
    CONSTRAINT ck_tasks_state CHECK (state IN ('pending', 'running', 'done', 'split', 'failed')),
    CONSTRAINT ck_tasks_count_present CHECK ((state IN ('done', 'split') AND count IS NOT NULL) OR (state IN ('pending', 'running', 'failed') AND count IS NULL)),
    CONSTRAINT ck_tasks_nonnegative CHECK (count >= 0 AND nodes >= 0 AND depth >= 0 AND attempts >= 0)
);

-- Next pending tasks of a run, tasks by state.
CREATE INDEX ix_tasks_run_state ON tasks (run_id, state, id);

-- Remainder children of a split task.
CREATE INDEX ix_tasks_parent ON tasks (parent_id);

-- The largest, longest and latest tasks of a run, read from the top (only tasks that have the value).
CREATE INDEX ix_tasks_run_count ON tasks (run_id, count DESC, id) WHERE count IS NOT NULL;
CREATE INDEX ix_tasks_run_seconds ON tasks (run_id, seconds DESC, id) WHERE seconds IS NOT NULL;
CREATE INDEX ix_tasks_run_finished ON tasks (run_id, finished_at DESC, id) WHERE finished_at IS NOT NULL;

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

-- Facts about the store: schema_version (foldfarm refuses one it does not know), and in a store
-- upgraded from version 1 legacy_task_ids (task ids 1 .. this were handed out by version 1).
CREATE TABLE meta (
    name          VARCHAR(64)   NOT NULL PRIMARY KEY,
    value         VARCHAR(256)  NOT NULL
);

-- A run's task numbers and tallies; one row per run, made with the run.
CREATE TABLE run_tallies (
    run_id          BIGINT        NOT NULL PRIMARY KEY REFERENCES runs (id),
    tasks_numbered  BIGINT        NOT NULL,   -- task ids handed out: run_id * 10000000000 + 1 .. + this
    pending         BIGINT        NOT NULL,   -- tasks in each state
    running         BIGINT        NOT NULL,
    done            BIGINT        NOT NULL,
    split           BIGINT        NOT NULL,
    failed          BIGINT        NOT NULL,
    done_count      VARCHAR(64)   NOT NULL,   -- sum of count over done tasks, decimal digits
    split_count     VARCHAR(64)   NOT NULL,   -- sum of partial count over split tasks, decimal digits
    nodes           VARCHAR(64)   NOT NULL,   -- sum of nodes over done and split tasks, decimal digits
    seconds         DOUBLE PRECISION NOT NULL,  -- sum of seconds over done and split tasks
    audits          BIGINT        NOT NULL,   -- audits of the run's tasks
    mismatches      BIGINT        NOT NULL,   -- of which disagreed with the recorded count
    CONSTRAINT ck_run_tallies_nonnegative CHECK (tasks_numbered >= 0 AND pending >= 0 AND running >= 0 AND done >= 0 AND split >= 0 AND failed >= 0 AND seconds >= 0 AND audits >= 0 AND mismatches >= 0),
    CONSTRAINT ck_run_tallies_done_count_digits CHECK (done_count IS NULL OR (LENGTH(done_count) BETWEEN 1 AND 64 AND TRIM(done_count, '0123456789') = '' AND (done_count = '0' OR SUBSTR(done_count, 1, 1) <> '0'))),
    CONSTRAINT ck_run_tallies_split_count_digits CHECK (split_count IS NULL OR (LENGTH(split_count) BETWEEN 1 AND 64 AND TRIM(split_count, '0123456789') = '' AND (split_count = '0' OR SUBSTR(split_count, 1, 1) <> '0'))),
    CONSTRAINT ck_run_tallies_nodes_digits CHECK (nodes IS NULL OR (LENGTH(nodes) BETWEEN 1 AND 64 AND TRIM(nodes, '0123456789') = '' AND (nodes = '0' OR SUBSTR(nodes, 1, 1) <> '0')))
);

-- Next free id of runs and audits.
CREATE TABLE id_counters (
    name          VARCHAR(16)   NOT NULL PRIMARY KEY,
    next_id       BIGINT        NOT NULL
);

INSERT INTO meta (name, value) VALUES ('schema_version', '2');
INSERT INTO id_counters (name, next_id) VALUES ('audits', 1);
INSERT INTO id_counters (name, next_id) VALUES ('runs', 1);
