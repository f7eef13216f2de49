-- rondo workspace store, schema version 4: a program whose hash could not be computed.
-- `program_blake3` is NULL when the program file could not be read as the attempt, analysis
-- or report was recorded (for built-in stages and analyses: rondo's own executable, e.g.
-- replaced or deleted while rondo ran); `program_unknown` then says why. Never both NULL
-- for a row that names a program.
ALTER TABLE attempts ADD COLUMN program_unknown TEXT;
ALTER TABLE reports ADD COLUMN program_unknown TEXT;
