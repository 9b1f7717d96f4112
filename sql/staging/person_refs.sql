-- Registry references of staged person records: the same person key already in the registry.
-- Grain: one row per staged record that references the registry. Output: temp table stage_refs.
CREATE OR REPLACE TEMP TABLE stage_refs AS
SELECT
    s.row_k,
    CAST([] AS STRUCT(field VARCHAR, raw_value VARCHAR, reason VARCHAR)[]) AS problems,
    hash(g.person_key, g.birth_date, g.sex, g.site, g.death_date, g.followup_end) AS registry_hash,
    g.source_id AS registry_source
FROM stage_checked AS s
JOIN person AS g ON g.person_key = s.person_key;
