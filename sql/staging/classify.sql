-- Classify staged records: load, duplicate or quarantine, and number the exceptions.
-- Grain: one row per staged record that is NOT simply loaded (problems, a key already in the
-- registry, a key repeated in the file) or that was repaired; every other record loads.
-- Input: stage_checked (row_k, dedup_key (a row of the key columns), key_hash, problems, repairs,
-- ...), stage_content (row_k, content_hash of the records that need one: content_needed.sql),
-- stage_repeats (key_hash: the hashes more than one record without problems
-- has; found by the loader with a sort, see loader._write_repeated_keys; the session variable
-- dromos_keys_repeat is false when it is empty, so that test folds away),
-- stage_refs (row_k, problems, registry_hash, registry_source: registry references of the
-- few records that have them) and skip_offset (k_start, lines_before): the source
-- line of the k-th parsed row is k + lines_before of the last k_start <= k (header, empty and
-- rejected lines are not parsed). A record with problems is quarantined. A clean record whose
-- key is in the registry, or in an earlier clean record of the file, is a duplicate when its
-- content is identical and is quarantined as a conflict otherwise (nothing is overwritten).
CREATE OR REPLACE TEMP TABLE stage_outcome AS
WITH candidates AS (
    SELECT c.row_k, c.dedup_key, c.repairs, h.content_hash,
           list_concat(c.problems, coalesce(r.problems, [])) AS problems,
           r.registry_hash, r.registry_source,
           len(c.problems) = 0 AND coalesce(len(r.problems), 0) = 0 AS clean
    FROM stage_checked AS c
    LEFT JOIN stage_refs AS r ON r.row_k = c.row_k
    LEFT JOIN stage_content AS h ON h.row_k = c.row_k
    WHERE len(c.problems) > 0
       OR r.row_k IS NOT NULL
       OR len(c.repairs) > 0
       OR (getvariable('dromos_keys_repeat') AND len(c.problems) = 0
           AND c.key_hash IN (SELECT key_hash FROM stage_repeats))
),
ranked AS (
    SELECT
        c.*,
        row_number() OVER (PARTITION BY c.dedup_key, c.clean ORDER BY c.row_k) AS key_rank,
        first_value(c.content_hash) OVER (PARTITION BY c.dedup_key, c.clean ORDER BY c.row_k) AS first_hash
    FROM candidates AS c
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
    j.row_k,
    j.row_k + coalesce(o.lines_before, 0) - $header_lines AS record,
    CAST(j.dedup_key AS VARCHAR) AS dedup_key,
    CASE
        WHEN NOT j.clean OR j.conflict THEN 'quarantine'
        WHEN j.key_finding IS NOT NULL THEN 'duplicate'
        ELSE 'load'
    END AS status,
    CASE WHEN NOT j.conflict THEN j.key_finding END AS duplicate_reason,
    CASE
        WHEN j.conflict THEN [{'field': 'key', 'raw_value': CAST(j.dedup_key AS VARCHAR), 'reason': j.key_finding}]
        ELSE j.problems
    END AS problems,
    j.repairs
FROM judged AS j
ASOF LEFT JOIN skip_offset AS o ON j.row_k >= o.k_start;
