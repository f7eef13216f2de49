-- The allow-listed environment that reached each attempt (JSON object, name -> value;
-- docs/provenance.md, "Environment"). NULL for attempts recorded before this migration.
ALTER TABLE attempts ADD COLUMN env_json TEXT;
