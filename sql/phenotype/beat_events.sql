-- Beat events for the beat-level AV conduction classifier (cohort/phenotype/beats_batch.py).
-- Grain: one row per wave onset (P or QRS) in wave_event. strip_no numbers the strips densely
-- (0, 1, ...) in ecg_key order; rows are ordered by strip, then kind (QRS before P), then time,
-- so that numpy can split the columns into per-strip QRS and P runs with searchsorted.
WITH events AS (
    SELECT
        ecg_key,
        t_ms,
        kind = 'P' AS is_p
    FROM wave_event
),

numbered AS (
    SELECT
        ecg_key,
        t_ms,
        is_p,
        dense_rank() OVER (ORDER BY ecg_key) - 1 AS strip_no
    FROM events
)

SELECT
    strip_no,
    ecg_key,
    t_ms,
    is_p
FROM numbered
ORDER BY strip_no, is_p, t_ms
