-- Warm starts between two converged neighbours (`warm-start: { estimate: linear }`, the
-- default): a point added by a revision that lies between two converged points along one
-- of the named axes begins, for each `previous:` input of its first iteration that rondo can
-- read as numbers, from the linear interpolation of the two points' last good outputs
-- (chosen and stored when the revision is recorded, in its transaction). Inputs without a
-- row here come from the nearest point (`warm_starts`).
CREATE TABLE warm_blends (
    point            TEXT NOT NULL REFERENCES points(id),
    stage            TEXT NOT NULL,          -- the `previous:` source stage
    role             TEXT NOT NULL,          -- its output
    artifact         TEXT NOT NULL REFERENCES artifacts(hash),
    axis             TEXT NOT NULL,          -- the sweep axis interpolated along
    first_point      TEXT NOT NULL REFERENCES points(id),
    first_iteration  INTEGER NOT NULL,
    first_artifact   TEXT NOT NULL REFERENCES artifacts(hash),
    second_point     TEXT NOT NULL REFERENCES points(id),
    second_iteration INTEGER NOT NULL,
    second_artifact  TEXT NOT NULL REFERENCES artifacts(hash),
    weight           REAL NOT NULL,          -- t: artifact = first + t·(second − first)
    PRIMARY KEY (point, stage, role)
);
CREATE INDEX warm_blends_by_artifact ON warm_blends(artifact);
