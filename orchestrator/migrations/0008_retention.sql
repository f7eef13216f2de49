-- rondo workspace store, schema version 8: content removed by a retention policy. The
-- artifact row (hash, size, name) and every record naming it stay; only the file under
-- store/ goes. A row is written before the file is deleted, so a crash in between leaves a
-- file marked removed (deleted by the next pass), never a missing file without a record.
CREATE TABLE IF NOT EXISTS removals (
    hash        TEXT PRIMARY KEY REFERENCES artifacts(hash),
    size        INTEGER NOT NULL,
    removed_at  TEXT NOT NULL,
    policy      TEXT NOT NULL,      -- e.g. "last:2", "every:10", or "last:2,every:10"
    point       TEXT,               -- the reference that was let go, for people
    stage       TEXT,
    role        TEXT,
    iteration   INTEGER
);
