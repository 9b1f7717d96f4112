-- Registry references of staged ECG reads: the person must be known and alive at acquisition;
-- the same (ecg_key, read_kind) may already be loaded.
-- Grain: one row per staged record with a reference problem or a registry match.
-- Output: temp table stage_refs (row_k, problems, registry_hash, registry_source).
CREATE OR REPLACE TEMP TABLE stage_refs AS
WITH person_checks AS (
    SELECT
        s.row_k,
        list_filter([
            dromos_problem('person_key', s.person_key, pe.person_key IS NULL, 'unknown person (not in the registry; load the person file first)'),
            dromos_problem('acquired_at', s.acquired_at, CAST(s.acquired_at AS DATE) < pe.birth_date, 'acquired before birth'),
            dromos_problem('acquired_at', s.acquired_at, CAST(s.acquired_at AS DATE) > pe.death_date + p.latest_slack_days, 'acquired after death')
        ], lambda x: x IS NOT NULL) AS problems
    FROM stage_checked AS s
    CROSS JOIN ingest_param AS p
    LEFT JOIN person AS pe ON pe.person_key = s.person_key
    WHERE s.person_key IS NOT NULL  -- lists only for rows with a problem:
      AND (pe.person_key IS NULL
           OR CAST(s.acquired_at AS DATE) < pe.birth_date
           OR CAST(s.acquired_at AS DATE) > pe.death_date + p.latest_slack_days)
),
registry_matches AS (
    SELECT
        s.row_k,
        hash(g.person_key, g.acquired_at, g.site, g.ventricular_rate, g.atrial_rate, g.pr_ms, g.qrs_ms,
             g.qt_ms, g.qtc_ms, g.p_axis, g.qrs_axis, g.t_axis, g.statements, g.statement_codes) AS registry_hash,
        g.source_id AS registry_source
    FROM stage_checked AS s
    JOIN ecg AS g ON g.ecg_key = s.ecg_key AND g.read_kind = s.read_kind
)
SELECT
    coalesce(c.row_k, m.row_k) AS row_k,
    coalesce(c.problems, []) AS problems,
    m.registry_hash,
    m.registry_source
FROM person_checks AS c
FULL OUTER JOIN registry_matches AS m ON m.row_k = c.row_k;
