-- Registry references of staged waves: the tracing must be loaded; the same wave may be too.
-- Grain: one row per staged record with a reference problem or a registry match.
CREATE OR REPLACE TEMP TABLE stage_refs AS
-- The tracings of this file (few, many waves each) are looked up in the registry, not the other
-- way round: the registry may hold millions of ECGs.
WITH staged_tracing AS (
    SELECT DISTINCT ecg_key FROM stage_checked WHERE ecg_key IS NOT NULL
),
missing AS (
    SELECT t.ecg_key
    FROM staged_tracing AS t
    WHERE NOT EXISTS (SELECT 1 FROM ecg AS g WHERE g.ecg_key = t.ecg_key)
),
unknown_tracing AS (
    SELECT s.row_k, [{'field': 'ecg_key', 'raw_value': s.ecg_key,
                      'reason': 'unknown tracing (not in the registry; load the ECG file first)'}] AS problems
    FROM stage_checked AS s
    JOIN missing AS m ON m.ecg_key = s.ecg_key
),
registry_matches AS (
    SELECT s.row_k, hash(g.ecg_key, g.t_ms, g.kind) AS registry_hash, g.source_id AS registry_source
    FROM stage_checked AS s
    JOIN wave_event AS g ON g.ecg_key = s.ecg_key AND g.t_ms = s.t_ms AND g.kind = s.kind
)
SELECT coalesce(u.row_k, m.row_k) AS row_k, coalesce(u.problems, []) AS problems, m.registry_hash, m.registry_source
FROM unknown_tracing AS u
FULL OUTER JOIN (SELECT DISTINCT ON (row_k) * FROM registry_matches) AS m ON m.row_k = u.row_k;
