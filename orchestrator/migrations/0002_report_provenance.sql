-- rondo workspace store, schema version 2: provenance of report generations.
-- A report reads metrics of recorded attempts and writes figure data (CSV) into the artifact
-- store; these tables make `rondo trace fig.csv` reach the attempts behind every number.
-- Written with IF NOT EXISTS so that a workspace where `rondo report` created them before
-- this migration was registered migrates cleanly.

CREATE TABLE IF NOT EXISTS reports (
    id             INTEGER PRIMARY KEY,    -- report id
    argv_json      TEXT NOT NULL,          -- command line that asked for it (JSON array)
    out_dir        TEXT NOT NULL,          -- report folder (absolute)
    options_json   TEXT NOT NULL,          -- axis and metric names used (JSON object)
    program_path   TEXT,                   -- the rondo executable
    program_blake3 TEXT,                   -- its BLAKE3
    host           TEXT,
    started_at     TEXT NOT NULL,
    ended_at       TEXT,                   -- set once every output is recorded
    rondo_version  TEXT NOT NULL
);

CREATE TABLE IF NOT EXISTS report_sources (
    report_id  INTEGER NOT NULL REFERENCES reports(id),
    attempt_id INTEGER NOT NULL REFERENCES attempts(id),   -- an attempt whose metrics were read
    PRIMARY KEY (report_id, attempt_id)
);

CREATE TABLE IF NOT EXISTS report_outputs (
    report_id INTEGER NOT NULL REFERENCES reports(id),
    role      TEXT NOT NULL,               -- file name inside the report folder, e.g. "eos-t100.csv"
    artifact  TEXT NOT NULL REFERENCES artifacts(hash),
    PRIMARY KEY (report_id, role)
);
CREATE INDEX IF NOT EXISTS report_outputs_by_artifact ON report_outputs(artifact);
