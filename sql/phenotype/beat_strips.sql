-- Strips of the beat-level AV conduction classifier (cohort/phenotype/beats_batch.py).
-- Grain: one row per distinct ecg_key in wave_event. strip_no numbers the strips densely
-- (0, 1, ...) in ecg_key order; run into the temporary table phen_beat_strip, which
-- beat_events.sql joins, so the million-row event list is sorted by integers, not by keys.
WITH keys AS (
    SELECT DISTINCT ecg_key FROM wave_event
)

SELECT
    ecg_key,
    row_number() OVER (ORDER BY ecg_key) - 1 AS strip_no
FROM keys
