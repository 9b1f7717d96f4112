-- ecg_conduction_core: the per-ECG part of ecg_conduction (keys, the measurement values used
-- after fallbacks, and the signature that points to the categories in conduction_signature).
-- Grain: one row per ecg_key, for rule set $rule_set_id. Read through the view ecg_conduction.
WITH
inputs AS (
    SELECT * FROM phen_ecg_input
)
SELECT
    ecg_key, person_key, acquired_at, read_kind, rule_set_id, pr_ms, qrs_ms, qrs_axis,
    ventricular_rate, atrial_rate, signature
FROM inputs
WHERE rule_set_id = $rule_set_id
