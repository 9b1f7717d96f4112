-- beat_input_empty: the same columns as beat_input.sql with no rows, used while the registry
-- has no beat_pattern table (no beat-level data, or the beat classifier was not run).
-- Grain: none (zero rows).
WITH
none AS (
    SELECT
        CAST(NULL AS VARCHAR) AS ecg_key,
        CAST(NULL AS VARCHAR) AS pattern,
        CAST(NULL AS DOUBLE) AS pr_median_ms
)
SELECT ecg_key, pattern, pr_median_ms
FROM none
WHERE ecg_key IS NOT NULL
