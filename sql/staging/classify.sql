-- Classify staged records: load, duplicate or quarantine.
-- Grain: one row per source record. Input: temp table stage_checked with columns record,
-- dedup_key, key_raw, problems, repairs, content_hash, registry_hash, registry_source and the
-- canonical columns. A record with problems is quarantined. A clean record whose key is already
-- in the registry, or in an earlier clean record of the same file, is a duplicate when its
-- content is identical and is quarantined as a conflict otherwise (nothing is overwritten).
CREATE OR REPLACE TEMP TABLE stage AS
WITH ranked AS (
    SELECT
        c.*,
        len(c.problems) = 0 AS clean,
        row_number() OVER (PARTITION BY c.dedup_key, len(c.problems) = 0 ORDER BY c.record) AS key_rank,
        first_value(c.content_hash) OVER (
            PARTITION BY c.dedup_key, len(c.problems) = 0 ORDER BY c.record
        ) AS first_hash
    FROM stage_checked AS c
),
judged AS (
    SELECT
        r.*,
        CASE
            WHEN NOT r.clean THEN NULL
            WHEN r.registry_hash IS NOT NULL AND r.registry_hash = r.content_hash
                THEN 'already in registry (source ' || r.registry_source || ')'
            WHEN r.registry_hash IS NOT NULL
                THEN 'conflicts with the registry row of the same key (source ' || r.registry_source || ')'
            WHEN r.key_rank > 1 AND r.first_hash = r.content_hash
                THEN 'repeats an earlier row of this file'
            WHEN r.key_rank > 1
                THEN 'conflicts with an earlier row of this file with the same key'
        END AS key_finding,
        r.clean AND (r.registry_hash IS NOT NULL OR r.key_rank > 1)
            AND coalesce(r.registry_hash, r.first_hash) <> r.content_hash AS conflict
    FROM ranked AS r
)
SELECT
    j.* EXCLUDE (problems, clean, key_rank, first_hash, key_finding, conflict),
    CASE
        WHEN NOT j.clean OR j.conflict THEN 'quarantine'
        WHEN j.key_finding IS NOT NULL THEN 'duplicate'
        ELSE 'load'
    END AS status,
    CASE WHEN NOT j.conflict THEN j.key_finding END AS duplicate_reason,
    CASE
        WHEN j.conflict THEN [{'field': 'key', 'raw_value': j.key_raw, 'reason': j.key_finding}]
        ELSE j.problems
    END AS problems
FROM judged AS j;
