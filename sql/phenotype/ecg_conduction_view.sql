-- ecg_conduction (view): rhythm, AV and ventricular conduction category of each ECG with the
-- evidence that decided them. Grain: one row per ecg_key per rule_set_id.
-- Stored as a narrow per-ECG table (ecg_conduction_core) and one row per distinct rule
-- signature (conduction_signature), so millions of ECGs do not each store their own copy of
-- the same categories and evidence list; this view joins them back.
WITH
core AS (
    SELECT * FROM ecg_conduction_core
),
signatures AS (
    SELECT * FROM conduction_signature
)
SELECT
    c.ecg_key, c.person_key, c.acquired_at, c.read_kind, c.rule_set_id,
    s.rhythm_class, s.rhythm_source,
    c.pr_ms, c.qrs_ms, c.qrs_axis, c.ventricular_rate, c.atrial_rate,
    s.* EXCLUDE (rule_set_id, signature, rhythm_class, rhythm_source),
    c.signature
FROM core AS c
JOIN signatures AS s ON s.rule_set_id = c.rule_set_id AND s.signature = c.signature
