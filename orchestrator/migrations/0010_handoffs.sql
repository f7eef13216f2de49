-- Hand-offs to resident programs (docs/resident.md): which attempt each one is, its number
-- for the process, the process, and the attempt that started that process and when (the
-- attempt's argv_json is the argument list that started it).
CREATE TABLE handoffs (
    attempt_id INTEGER PRIMARY KEY REFERENCES attempts(id),
    number INTEGER NOT NULL,
    process_id INTEGER NOT NULL,
    started_by INTEGER NOT NULL REFERENCES attempts(id),
    process_started_at TEXT NOT NULL
);
