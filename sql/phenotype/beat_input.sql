-- beat_input: the beat-level conduction pattern used for each ECG by the phenotype.
-- Grain: one row per ecg_key that has a beat_pattern row with rules_id $beats_rules_id (the
-- beat classifier's rule set named in the phenotype rule file); if an ECG had several rows,
-- the first pattern by name is kept so the result stays one row per ECG.
WITH
ranked AS (
    SELECT
        ecg_key,
        pattern,
        pr_median_ms,
        row_number() OVER (PARTITION BY ecg_key ORDER BY pattern) AS pattern_rank
    FROM beat_pattern
    WHERE rules_id = $beats_rules_id
)
SELECT ecg_key, pattern, pr_median_ms
FROM ranked
WHERE pattern_rank = 1
