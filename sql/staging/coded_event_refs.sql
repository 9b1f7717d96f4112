-- Registry references of staged procedure / diagnosis rows: the person must be known and born;
-- the same row may already be loaded (view target_rows = the target table).
-- Grain: one row per staged record with a reference problem or a registry match.
CREATE OR REPLACE TEMP TABLE stage_refs AS
WITH person_checks AS (
    SELECT
        s.row_k,
        list_filter([
            dromos_problem('person_key', s.person_key, pe.person_key IS NULL, 'unknown person (not in the registry; load the person file first)'),
            dromos_problem('date', s.date, s.date < pe.birth_date, 'dated before birth')
        ], lambda x: x IS NOT NULL) AS problems
    FROM stage_checked AS s
    LEFT JOIN person AS pe ON pe.person_key = s.person_key
    WHERE s.person_key IS NOT NULL
),
registry_matches AS (
    SELECT s.row_k, any_value(hash(g.person_key, g.date, g.code_system, g.code)) AS registry_hash,
           any_value(g.source_id) AS registry_source
    FROM stage_checked AS s
    JOIN target_rows AS g
        ON g.person_key = s.person_key AND g.date = s.date AND g.code_system = s.code_system AND g.code = s.code
    GROUP BY s.row_k
)
SELECT coalesce(c.row_k, m.row_k) AS row_k, coalesce(c.problems, []) AS problems, m.registry_hash, m.registry_source
FROM (SELECT * FROM person_checks WHERE len(problems) > 0) AS c
FULL OUTER JOIN registry_matches AS m ON m.row_k = c.row_k;
