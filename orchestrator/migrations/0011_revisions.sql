-- Revisions of the campaign file (docs/campaign-file.md, "Revising a campaign"): every
-- accepted text in full with its BLAKE3, numbered from 1 (the text of the first run), and
-- what the revision changed as `rondo check` classifies it (JSON). Every attempt records the
-- revision it ran under; every point the revision that made it and, once retired (its sweep
-- value removed, or its physics changed by an accepted revision), the revision that retired
-- it and why. `window_from` is the first iteration whose rules-met mark counts for the final
-- window: a revision that changes the stopping rules starts the window again after the last
-- good iteration of the points it leaves running, since earlier marks judged other rules.
CREATE TABLE revisions (
    number      INTEGER PRIMARY KEY,       -- 1, 2, ...
    spec_text   TEXT NOT NULL,             -- the exact campaign file text
    spec_blake3 TEXT NOT NULL,             -- BLAKE3 of spec_text (hex)
    created_at  TEXT NOT NULL,
    accepted    INTEGER NOT NULL DEFAULT 0, -- 1: physics changes accepted with --accept-revision
    changes     TEXT                       -- the classification (JSON); NULL for revision 1
);
INSERT INTO revisions(number, spec_text, spec_blake3, created_at)
    SELECT 1, spec_text, spec_blake3, created_at FROM campaign;

ALTER TABLE attempts ADD COLUMN revision INTEGER NOT NULL DEFAULT 1;
ALTER TABLE points ADD COLUMN revision INTEGER NOT NULL DEFAULT 1;
ALTER TABLE points ADD COLUMN retired_in INTEGER;
ALTER TABLE points ADD COLUMN retired_why TEXT;
ALTER TABLE points ADD COLUMN window_from INTEGER;
