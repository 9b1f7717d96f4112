-- Digest of each strip's wave events, so that beat patterns are recomputed only for strips
-- whose events changed (cohort/phenotype/beats_batch.py refresh_registry).
-- Grain: one row per distinct ecg_key in wave_event. digest is the number of events and the sum
-- of a 64-bit hash of each (as text: the sum needs 128 bits), independent of row order; any
-- added, removed or changed event of a strip changes it (a compensating change would need a
-- hash collision).
SELECT
    ecg_key,
    count(*) || ':' || CAST(sum(hash(t_ms, kind)) AS VARCHAR) AS digest
FROM wave_event
GROUP BY ecg_key
