-- rondo workspace store, schema version 6: folder artifacts. A folder is stored as a manifest
-- (an artifact whose original_name ends with '/'); its member files are stored by content
-- like any artifact and listed here, so a member file found on disk can be traced to the
-- folders that hold it. Rows are inserted once per folder (the same folder again adds none).
CREATE TABLE IF NOT EXISTS folder_members (
    folder   TEXT NOT NULL REFERENCES artifacts(hash),  -- the manifest's BLAKE3
    path     TEXT NOT NULL,                             -- relative, '/'-separated
    artifact TEXT NOT NULL,                             -- BLAKE3 of the member's content
    size     INTEGER NOT NULL,
    mode     TEXT NOT NULL,                             -- '644' or '755'
    PRIMARY KEY (folder, path)
);
CREATE INDEX IF NOT EXISTS folder_members_by_artifact ON folder_members(artifact);
