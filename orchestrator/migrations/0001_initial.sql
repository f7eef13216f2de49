-- rondo workspace store, schema version 1.
-- Every row is inserted once; only `state`/`reason`/end fields of points, iterations and
-- attempts change (state transitions). Times are RFC 3339 UTC text.

CREATE TABLE campaign (
    id             INTEGER PRIMARY KEY CHECK (id = 1),
    name           TEXT NOT NULL,
    spec_path      TEXT NOT NULL,          -- campaign file as given at the first run
    spec_text      TEXT NOT NULL,          -- the exact campaign file text
    spec_blake3    TEXT NOT NULL,          -- BLAKE3 of spec_text (hex)
    created_at     TEXT NOT NULL,
    rondo_version  TEXT NOT NULL,
    workspace_id   TEXT NOT NULL           -- random id, given to children as RONDO_WORKSPACE_ID
);

CREATE TABLE points (
    id          TEXT PRIMARY KEY,          -- e.g. "p003"
    idx         INTEGER NOT NULL UNIQUE,   -- 1-based index in sweep order
    values_json TEXT NOT NULL,             -- sweep values: {"volume": 27.0, ...}
    state       TEXT NOT NULL,             -- planned | running | converged | capped | failed | cancelled
    reason      TEXT                       -- why it stopped (failed / capped / cancelled)
);

CREATE TABLE iterations (
    point       TEXT NOT NULL REFERENCES points(id),
    iteration   INTEGER NOT NULL,          -- 1-based
    state       TEXT NOT NULL,             -- running | good | failed | cancelled
    started_at  TEXT NOT NULL,
    ended_at    TEXT,
    stop_json   TEXT,                      -- evaluation of the stopping rules after a good iteration
    PRIMARY KEY (point, iteration)
);

CREATE TABLE artifacts (
    hash          TEXT PRIMARY KEY,        -- BLAKE3 hex; the file lives at store/<2 hex>/<rest>
    size          INTEGER NOT NULL,
    original_name TEXT NOT NULL,           -- file name when first stored
    created_at    TEXT NOT NULL
);

CREATE TABLE attempts (
    id              INTEGER PRIMARY KEY,   -- attempt id (RONDO_ATTEMPT_ID)
    point           TEXT NOT NULL REFERENCES points(id),
    iteration       INTEGER NOT NULL,
    stage           TEXT NOT NULL,
    attempt         INTEGER NOT NULL,      -- 1-based attempt number for this point/iteration/stage
    state           TEXT NOT NULL,         -- planned | submitted | running | succeeded | failed | lost | cancelled
    argv_json       TEXT NOT NULL,         -- rendered argument list (JSON array)
    workdir         TEXT NOT NULL,         -- scratch directory (absolute)
    executor        TEXT NOT NULL,         -- local | slurm | pbs | builtin
    handle_id       TEXT,                  -- process group id / batch job id
    host            TEXT,
    started_at      TEXT,
    ended_at        TEXT,
    exit_status     INTEGER,
    failure_kind    TEXT,                  -- exit-status | signal | timeout | missing-output | nonfinite-output
                                           -- | malformed-output | launch-failed | lost | cancelled
    failure_message TEXT,
    program_path    TEXT,
    program_blake3  TEXT,
    program_version TEXT,                  -- output of the program's version flag, if declared
    parameters_json TEXT NOT NULL,         -- resolved parameters (campaign parameters + sweep values)
    seed            TEXT,                  -- {{seed}} value (decimal u64) when the template uses it
    rondo_version   TEXT NOT NULL,
    created_at      TEXT NOT NULL,
    FOREIGN KEY (point, iteration) REFERENCES iterations(point, iteration),
    UNIQUE (point, iteration, stage, attempt)
);

-- At most one succeeded attempt per point/iteration/stage.
CREATE UNIQUE INDEX attempts_one_success ON attempts(point, iteration, stage)
    WHERE state = 'succeeded';
CREATE INDEX attempts_by_state ON attempts(state);

CREATE TABLE attempt_inputs (
    attempt_id INTEGER NOT NULL REFERENCES attempts(id),
    role       TEXT NOT NULL,              -- input name of the stage (builtin mix: also "state")
    artifact   TEXT NOT NULL REFERENCES artifacts(hash),
    PRIMARY KEY (attempt_id, role)
);

CREATE TABLE attempt_outputs (
    attempt_id INTEGER NOT NULL REFERENCES attempts(id),
    role       TEXT NOT NULL,              -- output name (builtin mix: also "state"; "metrics" for metrics.json)
    artifact   TEXT NOT NULL REFERENCES artifacts(hash),
    PRIMARY KEY (attempt_id, role)
);
CREATE INDEX attempt_outputs_by_artifact ON attempt_outputs(artifact);

CREATE TABLE metrics (
    attempt_id INTEGER NOT NULL REFERENCES attempts(id),
    name       TEXT NOT NULL,              -- "stage.metric"
    value      REAL NOT NULL,
    error      REAL,                       -- standard error for noisy estimates
    PRIMARY KEY (attempt_id, name)
);

CREATE TABLE start_files (
    name     TEXT PRIMARY KEY,             -- key of `start:`
    artifact TEXT NOT NULL REFERENCES artifacts(hash)
);

CREATE TABLE events (
    seq        INTEGER PRIMARY KEY AUTOINCREMENT,
    at         TEXT NOT NULL,
    kind       TEXT NOT NULL,              -- run-started | run-ended | attempt-* | point-* | cancel | ...
    point      TEXT,
    iteration  INTEGER,
    attempt_id INTEGER,
    detail     TEXT                        -- free text or JSON
);
