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

CREATE TABLE IF NOT EXISTS report_outputs (
    report_id INTEGER NOT NULL REFERENCES reports(id),
    role      TEXT NOT NULL,               -- file name inside the report folder, e.g. "eos.csv"
    artifact  TEXT NOT NULL REFERENCES artifacts(hash),
    PRIMARY KEY (report_id, role)
);
CREATE INDEX IF NOT EXISTS report_outputs_by_artifact ON report_outputs(artifact);

CREATE TABLE IF NOT EXISTS report_sources (
    report_id  INTEGER NOT NULL,
    role       TEXT NOT NULL,              -- the output file whose numbers came from ...
    attempt_id INTEGER NOT NULL REFERENCES attempts(id),   -- ... this attempt's metrics
    PRIMARY KEY (report_id, role, attempt_id),
    FOREIGN KEY (report_id, role) REFERENCES report_outputs(report_id, role)
);
