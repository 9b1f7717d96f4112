-- conduction_signature: rhythm, AV and ventricular conduction categories with their evidence,
-- worked out once per distinct rule signature (see ecg_conduction_input.sql).
-- Grain: one row per distinct signature of table phen_ecg_input, for rule set $rule_set_id.
--
-- Precedence for the AV category: statements of the read used (confirmed > machine, because
-- the confirmed read is the one used) > beat-level pattern (table phen_beat_input, from
-- beat_pattern) > rate discordance (inferred, flagged av_inferred) > PR measurement. In rhythms
-- where the PR does not measure AV conduction (rule_param.pr_not_assessable) the category is
-- not_assessable unless a statement or beat pattern names a block that stays diagnosable there
-- (rule_param.av_accepted_when_na, e.g. third-degree block); such ECGs are never normal_pr.
-- A statement that contradicts the measurements keeps its category and the conflict is listed
-- in evidence ('conflict:...'). Measurements cannot tell RBBB from LBBB morphology: a QRS wider
-- than ivcd_above_ms without a bundle-branch statement is nonspecific_ivcd with
-- wide_qrs_morphology_unknown = true; the frontal axis gives LAFB / LPFB (Surawicz 2009).
-- Every threshold comes from rule_param (built from the rule file); no literal thresholds here.
WITH
param AS (
    SELECT * FROM rule_param WHERE rule_set_id = $rule_set_id
),
profile AS (
    SELECT * FROM statement_profile WHERE rule_set_id = $rule_set_id
),
signatures AS (
    SELECT DISTINCT
        signature, read_kind, profile_hash, machine_profile_hash, has_machine_read, beat_pattern,
        used_machine_measurements, used_beat_pr, pr_category, qrs_missing, qrs_wide, qrs_complete,
        qrs_below_incomplete, qrs_below_fascicular, axis_lafb, axis_lpfb, rate_ratio_class, adult
    FROM phen_ecg_input
    WHERE rule_set_id = $rule_set_id
),
base AS (
    SELECT
        g.*,
        ms.av_stmt AS machine_av_stmt,
        ms.vc_stmt_list AS machine_vc_list,
        ms.rhythm_stmt AS machine_rhythm_stmt,
        s.* EXCLUDE (rule_set_id, profile_hash, statements, statement_codes, n_reads)
    FROM signatures AS g
    LEFT JOIN profile AS s ON s.profile_hash = g.profile_hash
    LEFT JOIN profile AS ms ON ms.profile_hash = g.machine_profile_hash
),
measured AS (
    SELECT
        b.*,
        coalesce(
            b.rhythm_stmt,
            CASE WHEN p.infer_sinus_from_pr AND b.pr_category IS NOT NULL THEN 'sinus' ELSE 'other' END
        ) AS rhythm_class,
        CASE
            WHEN b.rhythm_stmt IS NOT NULL THEN 'statement'
            WHEN p.infer_sinus_from_pr AND b.pr_category IS NOT NULL THEN 'inferred_from_pr'
            ELSE 'unknown'
        END AS rhythm_source
    FROM base AS b
    CROSS JOIN param AS p
),
assessed AS (
    SELECT
        m.*,
        NOT list_contains(p.pr_not_assessable, m.rhythm_class)
            AND NOT (p.uncertain_rhythm_blocks_pr AND m.uncertain_na_rhythm) AS pr_assessable,
        CASE
            WHEN m.pr_category = 'short_pr' THEN p.lbl_pr_short
            WHEN m.pr_category = 'first_degree' THEN p.lbl_pr_first
            WHEN m.pr_category = 'marked_first_degree' THEN p.lbl_pr_marked
            WHEN m.pr_category = 'normal_pr' THEN p.lbl_pr_normal
        END AS pr_label,
        CASE
            WHEN p.rd_enabled AND NOT list_contains(p.pr_not_assessable, m.rhythm_class)
                THEN m.rate_ratio_class
        END AS rate_discordance,
        -- 1:1 beat patterns are graded by this rule set's PR thresholds.
        CASE
            WHEN m.beat_pattern IS NULL OR m.beat_pattern IN ('indeterminate', 'blocked_pac')
                THEN NULL
            WHEN m.beat_pattern IN ('normal', 'first_degree') AND m.pr_category IS NOT NULL
                THEN m.pr_category
            WHEN m.beat_pattern = 'normal' THEN 'normal_pr'
            ELSE m.beat_pattern
        END AS beat_category_raw
    FROM measured AS m
    CROSS JOIN param AS p
),
av_sources AS (
    SELECT
        a.*,
        CASE
            WHEN a.beat_category_raw IS NULL THEN NULL
            WHEN a.pr_assessable OR list_contains(p.av_accepted_when_na, a.beat_category_raw)
                THEN a.beat_category_raw
        END AS beat_category,
        CASE
            WHEN a.av_stmt IS NULL THEN NULL
            WHEN a.av_stmt = 'first_degree' AND a.pr_category = 'marked_first_degree'
                THEN 'marked_first_degree'
            WHEN a.av_stmt = 'first_degree' AND p.pr_overrides_first_degree
                AND a.pr_category IN ('normal_pr', 'short_pr') THEN a.pr_category
            ELSE a.av_stmt
        END AS stmt_category,
        a.av_stmt IS NULL AND (a.av_negated OR a.global_normal) AS av_stmt_normal,
        CASE
            WHEN p.rd_sets_category AND a.rate_discordance IS NOT NULL AND NOT a.ctx_blocked_pac
                THEN CASE WHEN a.rate_discordance = '2to1' THEN 'two_to_one' ELSE 'high_grade' END
        END AS inferred_category
    FROM assessed AS a
    CROSS JOIN param AS p
),
av_decided AS (
    SELECT
        s.*,
        CASE
            WHEN s.stmt_category IS NOT NULL THEN s.stmt_category
            WHEN s.av_stmt_normal AND s.pr_assessable
                THEN CASE WHEN s.pr_category = 'short_pr' THEN 'short_pr' ELSE 'normal_pr' END
            WHEN s.beat_category IS NOT NULL THEN s.beat_category
            WHEN s.inferred_category IS NOT NULL THEN s.inferred_category
            WHEN NOT s.pr_assessable THEN 'not_assessable'
            WHEN s.pr_category IS NULL THEN 'not_assessable'
            ELSE s.pr_category
        END AS av_category,
        CASE
            WHEN s.stmt_category IS NOT NULL THEN 'statement'
            WHEN s.av_stmt_normal AND s.pr_assessable THEN 'statement_negation'
            WHEN s.beat_category IS NOT NULL THEN 'beat_pattern'
            WHEN s.inferred_category IS NOT NULL THEN 'inferred'
            WHEN NOT s.pr_assessable THEN 'rhythm'
            WHEN s.pr_category IS NULL THEN 'missing'
            ELSE 'measurement'
        END AS av_source
    FROM av_sources AS s
),
vc_inputs AS (
    SELECT
        d.*,
        coalesce(d.rhythm_finding = 'paced_ventricular', false) AS ventricular_paced,
        d.adult AND NOT d.ctx_preexcitation AND NOT coalesce(d.ventricular_rhythm, false)
            AND coalesce(d.rhythm_finding <> 'paced_ventricular', true)
            AS measurement_ok,
        d.s_rbbb OR d.s_lbbb OR d.s_incomplete_rbbb OR d.s_incomplete_lbbb OR d.s_bifascicular
            OR d.s_ivcd OR d.s_bbb_unspecified AS bundle_stmt,
        (d.vc_negated OR d.global_normal)
            AND NOT (d.s_rbbb OR d.s_lbbb OR d.s_incomplete_rbbb OR d.s_incomplete_lbbb
                OR d.s_bifascicular OR d.s_ivcd OR d.s_bbb_unspecified OR d.s_lafb OR d.s_lpfb)
            AS vc_stmt_normal,
        d.ctx_rv_hypertrophy OR d.ctx_lateral_infarct OR d.ctx_dextrocardia AS lpfb_excluded,
        -- A statement that names only the axis deviation is the reader's verdict that the
        -- axis is not a fascicular block (rule_param.axis_statement_blocks_fascicular).
        p.axis_statement_blocks_fascicular AND d.ctx_left_axis_deviation AS lafb_declined,
        p.axis_statement_blocks_fascicular AND d.ctx_right_axis_deviation AS lpfb_declined
    FROM av_decided AS d
    CROSS JOIN param AS p
),
vc_flags AS (
    SELECT
        v.*,
        coalesce(
            p.fascicular_from_axis AND v.measurement_ok AND NOT v.vc_stmt_normal AND v.axis_lafb
            AND NOT v.lafb_declined AND NOT (v.s_lbbb OR v.s_incomplete_lbbb)
            AND (v.qrs_below_fascicular OR v.s_rbbb), false
        ) AS m_lafb,
        coalesce(
            p.fascicular_from_axis AND v.measurement_ok AND NOT v.vc_stmt_normal AND v.axis_lpfb
            AND NOT v.lpfb_excluded AND NOT v.lpfb_declined
            AND NOT (v.s_lbbb OR v.s_incomplete_lbbb)
            AND (v.qrs_below_fascicular OR v.s_rbbb), false
        ) AS m_lpfb,
        coalesce(
            v.measurement_ok AND NOT v.vc_stmt_normal AND NOT v.bundle_stmt AND v.qrs_wide, false
        ) AS m_wide_raw
    FROM vc_inputs AS v
    CROSS JOIN param AS p
),
vc_wide AS (
    -- A QRS of 111-119 ms that meets the fascicular axis criteria is read as the fascicular
    -- block (which widens the QRS a little), not as a separate nonspecific IVCD.
    SELECT *, m_wide_raw AND NOT (m_lafb OR m_lpfb) AS m_wide
    FROM vc_flags
),
vc_final AS (
    SELECT
        f.*,
        f.s_lafb OR f.m_lafb AS lafb,
        f.s_lpfb OR f.m_lpfb AS lpfb,
        f.s_bifascicular OR (f.s_rbbb AND (f.s_lafb OR f.m_lafb OR f.s_lpfb OR f.m_lpfb))
            AS bifascicular,
        f.s_bifascicular
            AND NOT (f.s_rbbb AND (f.s_lafb OR f.m_lafb OR f.s_lpfb OR f.m_lpfb))
            AS bifascicular_parts_unknown,
        f.s_ivcd OR f.m_wide AS nonspecific_ivcd,
        list_filter([
            CASE WHEN f.ventricular_paced THEN 'paced' END,
            CASE WHEN f.s_bifascicular
                OR (f.s_rbbb AND (f.s_lafb OR f.m_lafb OR f.s_lpfb OR f.m_lpfb))
                THEN 'bifascicular' END,
            CASE WHEN f.s_lbbb THEN 'lbbb' END,
            CASE WHEN f.s_rbbb THEN 'rbbb' END,
            CASE WHEN f.s_ivcd OR f.m_wide THEN 'nonspecific_ivcd' END,
            CASE WHEN f.s_incomplete_lbbb THEN 'incomplete_lbbb' END,
            CASE WHEN f.s_lafb OR f.m_lafb THEN 'lafb' END,
            CASE WHEN f.s_lpfb OR f.m_lpfb THEN 'lpfb' END,
            CASE WHEN f.s_incomplete_rbbb THEN 'incomplete_rbbb' END,
            CASE WHEN f.s_bbb_unspecified THEN p.unspecified_bbb_as END
        ], lambda c: c IS NOT NULL) AS vc_present,
        list_filter([
            CASE WHEN f.ventricular_paced THEN 'paced' END,
            CASE WHEN f.s_bifascicular OR (f.s_rbbb AND (f.s_lafb OR f.s_lpfb))
                THEN 'bifascicular' END,
            CASE WHEN f.s_lbbb THEN 'lbbb' END,
            CASE WHEN f.s_rbbb THEN 'rbbb' END,
            CASE WHEN f.s_ivcd THEN 'nonspecific_ivcd' END,
            CASE WHEN f.s_incomplete_lbbb THEN 'incomplete_lbbb' END,
            CASE WHEN f.s_lafb THEN 'lafb' END,
            CASE WHEN f.s_lpfb THEN 'lpfb' END,
            CASE WHEN f.s_incomplete_rbbb THEN 'incomplete_rbbb' END,
            CASE WHEN f.s_bbb_unspecified THEN p.unspecified_bbb_as END
        ], lambda c: c IS NOT NULL) AS vc_stmt_present
    FROM vc_wide AS f
    CROSS JOIN param AS p
),
categorized AS (
    SELECT
        v.*,
        coalesce(
            list_filter(p.vc_rank, lambda c: list_contains(v.vc_present, c))[1],
            CASE
                WHEN v.vc_stmt_normal THEN 'normal'
                WHEN v.measurement_ok AND NOT v.qrs_missing THEN 'normal'
                ELSE 'not_assessable'
            END
        ) AS ventricular_conduction,
        list_filter(p.vc_rank, lambda c: list_contains(v.vc_present, c))[1]
            IS NOT DISTINCT FROM list_filter(p.vc_rank, lambda c: list_contains(v.vc_stmt_present, c))[1]
            AS vc_from_statement
    FROM vc_final AS v
    CROSS JOIN param AS p
),
evidenced AS (
    SELECT
        c.*,
        list_concat(
            list_filter([
                CASE c.rhythm_source
                    WHEN 'inferred_from_pr' THEN 'rhythm:inferred_sinus_from_pr'
                    WHEN 'unknown' THEN 'rhythm:unknown'
                END,
                CASE WHEN c.read_kind = 'confirmed' AND c.has_machine_read
                    AND (c.machine_av_stmt IS DISTINCT FROM c.av_stmt
                        OR c.machine_vc_list IS DISTINCT FROM c.vc_stmt_list
                        OR c.machine_rhythm_stmt IS DISTINCT FROM c.rhythm_stmt)
                    THEN 'override:machine_statement_by_confirmed' END,
                CASE WHEN c.used_machine_measurements THEN 'fallback:machine_measurements' END,
                CASE WHEN c.used_beat_pr THEN 'fallback:beat_pr_median' END
            ], lambda e: e IS NOT NULL),
            coalesce(c.stmt_evidence, []::VARCHAR[]),
            list_filter([
                c.av_ignored_evidence,
                CASE WHEN c.beat_pattern IS NOT NULL THEN 'beat_pattern:' || c.beat_pattern END,
                CASE WHEN c.beat_category_raw IS NOT NULL AND c.beat_category IS NULL
                    THEN 'ignored:beat_pattern_' || c.beat_pattern || '_in_' || c.rhythm_class END,
                CASE WHEN c.rate_discordance IS NOT NULL
                    THEN 'inferred:rate_discordance_' || c.rate_discordance END,
                CASE WHEN c.rate_discordance IS NOT NULL AND c.ctx_blocked_pac
                    THEN 'inferred:suppressed_by_blocked_pac' END,
                CASE WHEN c.av_source IN ('statement', 'statement_negation')
                    AND c.beat_category IS NOT NULL AND c.beat_category <> c.av_category
                    THEN 'override:beat_pattern_by_statement' END,
                CASE WHEN c.av_source IN ('statement', 'statement_negation')
                    AND c.inferred_category IS NOT NULL AND c.inferred_category <> c.av_category
                    THEN 'override:inferred_by_statement' END,
                CASE WHEN c.av_source = 'beat_pattern'
                    AND c.inferred_category IS NOT NULL AND c.inferred_category <> c.av_category
                    THEN 'override:inferred_by_beat_pattern' END,
                CASE WHEN c.av_source = 'beat_pattern' AND c.pr_category IS NOT NULL
                    AND c.pr_category <> c.av_category
                    THEN 'override:measurement_by_beat_pattern' END,
                CASE WHEN c.av_source = 'inferred' AND c.pr_category IS NOT NULL
                    THEN 'override:measurement_by_inferred' END,
                CASE WHEN c.av_source IN ('measurement', 'beat_pattern')
                    AND c.av_category = c.pr_category
                    THEN 'measurement:' || c.pr_label END,
                CASE WHEN c.av_source = 'statement' AND c.av_stmt = 'first_degree'
                    AND c.av_category = 'marked_first_degree'
                    THEN 'measurement:' || p.lbl_pr_marked END,
                CASE WHEN c.av_source = 'statement' AND c.av_stmt = 'first_degree'
                    AND c.av_category IN ('normal_pr', 'short_pr')
                    THEN 'override:first_degree_statement_by_' || p.lbl_pr_not_first END,
                CASE WHEN c.av_source = 'rhythm'
                    THEN CASE WHEN list_contains(p.pr_not_assessable, c.rhythm_class)
                        THEN 'not_assessable:pr_in_' || c.rhythm_class
                        ELSE 'not_assessable:uncertain_rhythm' END END,
                CASE WHEN c.av_source = 'missing' THEN 'not_assessable:pr_missing' END,
                CASE WHEN c.av_stmt IN ('first_degree', 'marked_first_degree')
                    AND c.pr_category IN ('normal_pr', 'short_pr')
                    THEN 'conflict:first_degree_statement_' || p.lbl_pr_not_first END,
                CASE WHEN c.av_stmt = 'marked_first_degree'
                    AND c.pr_category = 'first_degree'
                    THEN 'conflict:marked_first_degree_statement_' || p.lbl_pr_not_marked END,
                CASE WHEN c.av_stmt = 'short_pr' AND c.pr_category <> 'short_pr'
                    THEN 'conflict:short_pr_statement_' || p.lbl_pr_not_short END,
                CASE WHEN c.av_source = 'statement_negation'
                    AND c.pr_category IN ('first_degree', 'marked_first_degree')
                    THEN 'conflict:no_av_block_statement_' || p.lbl_pr_first END,
                CASE WHEN c.m_wide THEN 'measurement:'
                    || CASE WHEN c.qrs_complete THEN p.lbl_qrs_complete ELSE p.lbl_qrs_ivcd END
                    || '_morphology_unknown' END,
                CASE WHEN c.m_lafb THEN 'measurement:' || p.lbl_axis_lafb END,
                CASE WHEN c.m_lpfb THEN 'measurement:' || p.lbl_axis_lpfb END,
                CASE WHEN c.measurement_ok AND c.axis_lpfb AND c.lpfb_excluded
                    AND NOT (c.s_lbbb OR c.s_incomplete_lbbb)
                    THEN 'excluded:lpfb_axis_other_cause' END,
                CASE WHEN c.measurement_ok AND c.axis_lafb AND c.lafb_declined AND NOT c.s_lafb
                    THEN 'excluded:lafb_axis_statement_left_axis_deviation' END,
                CASE WHEN c.measurement_ok AND c.axis_lpfb AND c.lpfb_declined AND NOT c.s_lpfb
                    AND NOT c.lpfb_excluded
                    THEN 'excluded:lpfb_axis_statement_right_axis_deviation' END,
                CASE WHEN c.av_source = 'statement' AND c.beat_pattern = 'blocked_pac'
                    AND c.av_category IN ('mobitz_i', 'mobitz_ii', 'two_to_one', 'high_grade')
                    THEN 'conflict:' || c.av_category || '_statement_beat_pattern_blocked_pac' END,
                CASE WHEN c.ventricular_conduction = 'normal' AND NOT c.vc_stmt_normal
                    THEN 'measurement:' || p.lbl_qrs_not_ivcd END,
                CASE WHEN c.ventricular_conduction = 'not_assessable' THEN
                    CASE
                        WHEN NOT c.adult THEN 'not_assessable:pediatric_qrs_criteria'
                        WHEN c.ctx_preexcitation THEN 'not_assessable:preexcitation'
                        WHEN c.ventricular_rhythm THEN 'not_assessable:ventricular_rhythm'
                        ELSE 'not_assessable:qrs_missing'
                    END END,
                CASE WHEN c.s_rbbb AND NOT c.qrs_complete
                    THEN 'conflict:rbbb_statement_' || p.lbl_qrs_not_complete END,
                CASE WHEN c.s_lbbb AND NOT c.qrs_complete
                    THEN 'conflict:lbbb_statement_' || p.lbl_qrs_not_complete END,
                CASE WHEN c.s_incomplete_rbbb AND (c.qrs_complete OR c.qrs_below_incomplete)
                    THEN 'conflict:incomplete_rbbb_statement_outside_' || p.lbl_qrs_incomplete END,
                CASE WHEN c.s_incomplete_lbbb AND (c.qrs_complete OR c.qrs_below_incomplete)
                    THEN 'conflict:incomplete_lbbb_statement_outside_' || p.lbl_qrs_incomplete END,
                CASE WHEN c.s_lafb AND NOT c.axis_lafb
                    THEN 'conflict:lafb_statement_outside_' || p.lbl_axis_lafb END,
                CASE WHEN c.s_lpfb AND NOT c.axis_lpfb
                    THEN 'conflict:lpfb_statement_outside_' || p.lbl_axis_lpfb END,
                CASE WHEN c.s_ivcd AND NOT c.qrs_wide
                    THEN 'conflict:ivcd_statement_' || p.lbl_qrs_not_ivcd END,
                CASE WHEN c.vc_stmt_normal AND c.measurement_ok AND c.qrs_wide
                    THEN 'conflict:normal_conduction_statement_' || p.lbl_qrs_ivcd END
            ], lambda e: e IS NOT NULL)
        ) AS evidence
    FROM categorized AS c
    CROSS JOIN param AS p
)
SELECT
    $rule_set_id AS rule_set_id,
    e.signature,
    e.rhythm_class,
    e.rhythm_source,
    e.pr_assessable,
    e.av_category,
    g.av_grade,
    g.is_higher_grade AS higher_grade,
    e.av_source,
    e.av_source = 'inferred' AS av_inferred,
    e.rate_discordance,
    e.beat_pattern,
    coalesce(e.av_subtype_unknown AND e.av_source = 'statement', false) AS av_subtype_unknown,
    e.ventricular_conduction,
    CASE
        WHEN e.ventricular_conduction = 'not_assessable' THEN 'none'
        WHEN e.ventricular_conduction = 'normal' AND e.vc_stmt_normal THEN 'statement'
        WHEN e.ventricular_conduction = 'normal' THEN 'measurement'
        WHEN e.vc_from_statement THEN 'statement'
        ELSE 'measurement'
    END AS vc_source,
    e.s_rbbb AS rbbb,
    e.s_incomplete_rbbb AS incomplete_rbbb,
    e.s_lbbb AS lbbb,
    e.s_incomplete_lbbb AS incomplete_lbbb,
    e.lafb,
    e.lpfb,
    e.bifascicular,
    e.bifascicular_parts_unknown,
    e.nonspecific_ivcd,
    e.m_wide AS wide_qrs_morphology_unknown,
    e.ventricular_paced,
    e.ctx_preexcitation AS preexcitation,
    e.rhythm_uncertain,
    e.av_uncertain,
    e.vc_uncertain,
    e.has_unrecognised,
    len(list_filter(e.evidence, lambda x: starts_with(x, 'conflict:'))) AS n_conflicts,
    e.evidence
FROM evidenced AS e
LEFT JOIN rule_category AS g ON g.rule_set_id = $rule_set_id AND g.av_category = e.av_category
