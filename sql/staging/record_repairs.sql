-- Repairs applied to loaded records (e.g. an interval given in seconds), one row per field.
-- Grain: (record, field).
INSERT INTO repair
SELECT $source_id, r.record, coalesce(cm.source, r.fix.field), r.fix.raw_value, r.fix.repaired_value, r.fix.rule
FROM (SELECT record, unnest(repairs) AS fix FROM stage WHERE status = 'load') AS r(record, fix)
LEFT JOIN column_map AS cm ON cm.canonical = r.fix.field;
