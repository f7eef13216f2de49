-- What each attempt cost (docs/concepts.md, "What each attempt cost"): CPU time in user and
-- system mode (seconds), maximum resident set (KiB) and wall time (seconds) of its program,
-- and where the figures come from (`wait4` of a local keeper, `job-script` for the batch
-- job script's own measure, `sacct` for the scheduler's accounting). NULL where unmeasured
-- (built-ins, attempts recorded before this migration, a batch job without either measure).
ALTER TABLE attempts ADD COLUMN cpu_user_s REAL;
ALTER TABLE attempts ADD COLUMN cpu_system_s REAL;
ALTER TABLE attempts ADD COLUMN max_rss_kib INTEGER;
ALTER TABLE attempts ADD COLUMN wall_s REAL;
ALTER TABLE attempts ADD COLUMN usage_source TEXT;

-- The same figures summed per point and stage as each attempt's are recorded, so that
-- `rondo status` and the report read one row per point and stage whatever the history's
-- length. Maximum RSS is the largest of any attempt.
CREATE TABLE usage_totals (
    point        TEXT NOT NULL REFERENCES points(id),
    stage        TEXT NOT NULL,
    attempts     INTEGER NOT NULL,       -- attempts with figures
    cpu_user_s   REAL NOT NULL,
    cpu_system_s REAL NOT NULL,
    wall_s       REAL NOT NULL,
    max_rss_kib  INTEGER,
    PRIMARY KEY (point, stage)
);
