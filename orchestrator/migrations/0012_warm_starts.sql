-- Warm starts: a point added by a revision of a campaign with `warm-start:` begins from the
-- last good iteration of the nearest converged point (chosen when the revision is recorded,
-- in its transaction): every `previous:` input of its first iteration is that point's output.
CREATE TABLE warm_starts (
    point TEXT PRIMARY KEY REFERENCES points(id),
    source_point TEXT NOT NULL REFERENCES points(id),
    source_iteration INTEGER NOT NULL,
    distance REAL NOT NULL
);
