-- Beat events for the beat-level AV conduction classifier (cohort/phenotype/beats_batch.py).
-- Grain: one row per wave onset (P or QRS) in wave_event. strip_no comes from the temporary
-- table phen_beat_strip (beat_strips.sql: strips numbered densely in ecg_key order); rows are
-- ordered by strip, then kind (QRS before P), then time, so that numpy can split the columns
-- into per-strip QRS and P runs with searchsorted.
WITH events AS (
    SELECT
        s.strip_no,
        w.t_ms,
        w.kind = 'P' AS is_p
    FROM wave_event AS w
    JOIN phen_beat_strip AS s ON s.ecg_key = w.ecg_key
)

SELECT
    strip_no,
    t_ms,
    is_p
FROM events
ORDER BY strip_no, is_p, t_ms
