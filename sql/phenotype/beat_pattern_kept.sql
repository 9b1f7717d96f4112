-- Stored beat_pattern rows still valid after wave_event changed (cohort/phenotype/beats_batch.py
-- refresh_registry): strips whose digest now (temporary table phen_beat_digest,
-- beat_strip_digest.sql) is the stored one (beat_strip). The complement of
-- beat_strips_changed.sql; strips no longer in wave_event are dropped. Grain: one row per
-- kept ecg_key.
SELECT b.*
FROM beat_pattern AS b
JOIN beat_strip AS s ON s.ecg_key = b.ecg_key
JOIN phen_beat_digest AS d ON d.ecg_key = b.ecg_key AND d.digest = s.digest
