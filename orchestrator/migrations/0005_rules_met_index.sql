-- rondo workspace store, schema version 5: the start of each point's final window (its
-- first good iteration whose stopping rules were met) is found through an index instead of
-- reading the point's whole history. Only good iterations carry `stop_json`.
CREATE INDEX IF NOT EXISTS iterations_rules_met ON iterations(point, iteration)
    WHERE json_extract(stop_json, '$.rules_met') = 1;
