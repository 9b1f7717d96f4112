-- Repairs applied to loaded records (e.g. an interval given in seconds), one row per field.
-- Grain: (record, field).
INSERT INTO repair
SELECT $source_id, r.record, coalesce(cm.source, r.fix.field), r.fix.raw_value, r.fix.repaired_value, r.fix.rule
FROM (SELECT record, unnest(repairs) AS fix FROM stage_outcome WHERE status = 'load') AS r
LEFT JOIN column_map AS cm ON cm.canonical = r.fix.field;
