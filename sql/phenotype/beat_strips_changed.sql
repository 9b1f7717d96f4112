-- Strips of the beat-level AV conduction classifier whose pattern must be computed again
-- (cohort/phenotype/beats_batch.py refresh_registry): strips of the temporary table
-- phen_beat_digest (beat_strip_digest.sql, wave_event now) whose digest differs from the one
-- stored in beat_strip, or that are new. Grain and numbering as beat_strips.sql: one row per
-- ecg_key, strip_no dense in ecg_key order. beat_pattern_kept.sql keeps the complement.
WITH keys AS (
    SELECT d.ecg_key
    FROM phen_beat_digest AS d
    LEFT JOIN beat_strip AS s ON s.ecg_key = d.ecg_key
    WHERE s.digest IS DISTINCT FROM d.digest
)

SELECT
    ecg_key,
    row_number() OVER (ORDER BY ecg_key) - 1 AS strip_no
FROM keys
