-- Quarantine records of the staged file: one row per problem of each quarantined record.
-- Grain: (record, problem). Field names are reported as the source file names them.
INSERT INTO quarantine
SELECT $source_id, q.record, coalesce(cm.source, q.problem.field), q.problem.raw_value, q.problem.reason
FROM (SELECT record, unnest(problems) AS problem FROM stage_outcome WHERE status = 'quarantine') AS q
LEFT JOIN column_map AS cm ON cm.canonical = q.problem.field;
