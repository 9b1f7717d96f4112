-- Fingerprint of wave_event, independent of row order: the number of events and the sum of a
-- 64-bit hash of each (as text, the sum needs 128 bits). Any added, removed or changed event
-- changes it (a compensating change would need a hash collision).
SELECT
    count(*) AS wave_events,
    CAST(coalesce(sum(hash(ecg_key, t_ms, kind)), 0) AS VARCHAR) AS wave_fingerprint
FROM wave_event
