-- ecg_conduction_input: per-ECG inputs of the conduction rules, reduced to a signature.
-- Grain: one row per ecg_key (the read view ecg_read picks: a confirmed overread supersedes
-- the machine read), for rule set $rule_set_id. Run into a temporary table.
-- The rules depend on the measurements only through threshold comparisons, so each ECG is
-- described by its statement profile, the machine read's profile (when a confirmed read
-- replaced it), the beat pattern and the boolean/category outcome of each comparison. ECGs
-- with equal signatures get equal categories and evidence: conduction_signature.sql works them
-- out once per distinct signature (a few thousand to a few hundred thousand for millions of
-- ECGs). Thresholds come from rule_param; none are written here.
WITH
param AS (
    SELECT * FROM rule_param WHERE rule_set_id = $rule_set_id
),
confirmed_keys AS (
    SELECT DISTINCT ecg_key FROM ecg WHERE read_kind = 'confirmed'
),
-- The read ecg_read picks, without its window: (ecg_key, read_kind) is unique (the loader
-- enforces it), so a key's confirmed read, or its machine read when it has none. The view's
-- window groups every read of the registry by key; this filter looks up the few confirmed keys.
chosen AS (
    SELECT
        ecg_key, person_key, acquired_at, read_kind, ventricular_rate, atrial_rate, pr_ms,
        qrs_ms, qrs_axis, hash(statements, statement_codes) AS profile_hash
    FROM ecg AS g
    WHERE read_kind = 'confirmed'
       OR NOT EXISTS (SELECT 1 FROM confirmed_keys AS k WHERE k.ecg_key = g.ecg_key)
),
machine_under_confirmed AS (
    SELECT
        m.ecg_key, m.ventricular_rate, m.atrial_rate, m.pr_ms, m.qrs_ms, m.qrs_axis,
        hash(m.statements, m.statement_codes) AS profile_hash
    FROM ecg AS m
    JOIN confirmed_keys AS k ON k.ecg_key = m.ecg_key
    WHERE m.read_kind = 'machine'
),
base AS (
    SELECT
        c.ecg_key, c.person_key, c.acquired_at, c.read_kind, c.profile_hash,
        m.profile_hash AS machine_profile_hash,
        m.ecg_key IS NOT NULL AS has_machine_read,
        b.pattern AS beat_pattern,
        coalesce(c.ventricular_rate, m.ventricular_rate) AS ventricular_rate,
        coalesce(c.atrial_rate, m.atrial_rate) AS atrial_rate,
        coalesce(c.pr_ms, m.pr_ms, b.pr_median_ms) AS pr_ms,
        coalesce(c.qrs_ms, m.qrs_ms) AS qrs_ms,
        -- Axis folded into (-180, 180] so that 270 reads as -90 and 181 as -179.
        180 - ((((180 - coalesce(c.qrs_axis, m.qrs_axis)) % 360) + 360) % 360) AS qrs_axis,
        coalesce(
            (c.pr_ms IS NULL AND m.pr_ms IS NOT NULL) OR (c.qrs_ms IS NULL AND m.qrs_ms IS NOT NULL)
            OR (c.qrs_axis IS NULL AND m.qrs_axis IS NOT NULL)
            OR (c.ventricular_rate IS NULL AND m.ventricular_rate IS NOT NULL)
            OR (c.atrial_rate IS NULL AND m.atrial_rate IS NOT NULL), false
        ) AS used_machine_measurements,
        c.pr_ms IS NULL AND m.pr_ms IS NULL AND b.pr_median_ms IS NOT NULL AS used_beat_pr,
        date_diff('day', pe.birth_date, CAST(c.acquired_at AS DATE)) / 365.25 AS age_years
    FROM chosen AS c
    LEFT JOIN machine_under_confirmed AS m ON m.ecg_key = c.ecg_key
    LEFT JOIN person AS pe ON pe.person_key = c.person_key
    LEFT JOIN phen_beat_input AS b ON b.ecg_key = c.ecg_key
),
bucketed AS (
    SELECT
        b.*,
        CASE
            WHEN b.pr_ms IS NULL THEN NULL
            WHEN b.pr_ms < p.short_below_ms THEN 'short_pr'
            WHEN b.pr_ms > p.marked_first_degree_ms
                OR (p.marked_first_degree_inclusive AND b.pr_ms = p.marked_first_degree_ms)
                THEN 'marked_first_degree'
            WHEN b.pr_ms > p.first_degree_ms
                OR (p.first_degree_inclusive AND b.pr_ms = p.first_degree_ms)
                THEN 'first_degree'
            ELSE 'normal_pr'
        END AS pr_category,
        b.qrs_ms IS NULL AS qrs_missing,
        b.qrs_ms > p.ivcd_above_ms AS qrs_wide,
        b.qrs_ms >= p.complete_bbb_min_ms AS qrs_complete,
        b.qrs_ms < p.incomplete_bbb_min_ms AS qrs_below_incomplete,
        b.qrs_ms < p.fascicular_below_ms AS qrs_below_fascicular,
        b.qrs_axis >= p.lafb_min_deg AND b.qrs_axis <= p.lafb_max_deg AS axis_lafb,
        b.qrs_axis >= p.lpfb_min_deg AND b.qrs_axis <= p.lpfb_max_deg AS axis_lpfb,
        CASE
            WHEN b.ventricular_rate > 0 AND b.atrial_rate IS NOT NULL
                AND b.ventricular_rate < p.rd_max_ventricular_rate
                AND b.atrial_rate / b.ventricular_rate >= p.rd_two_to_one_min
                THEN CASE
                    WHEN b.atrial_rate / b.ventricular_rate <= p.rd_two_to_one_max THEN '2to1'
                    ELSE 'high'
                END
        END AS rate_ratio_class,
        b.age_years IS NULL OR b.age_years >= p.adult_min_age_years AS adult
    FROM base AS b
    CROSS JOIN param AS p
)
SELECT
    ecg_key, person_key, acquired_at, read_kind,
    $rule_set_id AS rule_set_id,
    pr_ms, qrs_ms, qrs_axis, ventricular_rate, atrial_rate,
    profile_hash, machine_profile_hash, has_machine_read, beat_pattern, used_machine_measurements,
    used_beat_pr, pr_category, qrs_missing, qrs_wide, qrs_complete, qrs_below_incomplete,
    qrs_below_fascicular, axis_lafb, axis_lpfb, rate_ratio_class, adult,
    hash(
        read_kind, profile_hash, machine_profile_hash, has_machine_read, beat_pattern,
        used_machine_measurements, used_beat_pr, pr_category, qrs_missing, qrs_wide, qrs_complete,
        qrs_below_incomplete, qrs_below_fascicular, axis_lafb, axis_lpfb, rate_ratio_class, adult
    ) AS signature
FROM bucketed
