-- statement_profile: the statement-level findings of each distinct statement combination.
-- Grain: one row per distinct (statements, statement_codes) pair over all reads in `ecg`
-- (machine and confirmed; temp table phen_statement_combo, see statement_combo.sql), for rule
-- set $rule_set_id. Reads join back by profile_hash.
-- Machine statements repeat heavily, so the findings are worked out once per combination here
-- and not once per ECG. Inputs: statement_class (the Python lexicon's verdict on each distinct
-- statement and code), rule_finding (axis, category and rank of each finding in this rule set),
-- rule_param (switches). A finding is effective when it is not negated and is certain, or
-- uncertain and the rule set includes uncertain findings.
WITH
param AS (
    SELECT * FROM rule_param WHERE rule_set_id = $rule_set_id
),
combos AS (
    SELECT statements, statement_codes, n_reads FROM phen_statement_combo  -- statement_combo.sql
),
keyed AS (
    SELECT hash(statements, statement_codes) AS profile_hash, statements, statement_codes, n_reads
    FROM combos
),
items AS (
    SELECT profile_hash, 'statement' AS kind, unnest(statements) AS text FROM keyed
    UNION ALL
    SELECT profile_hash, 'code' AS kind, unnest(statement_codes) AS text FROM keyed
),
found AS (
    SELECT DISTINCT i.profile_hash, i.kind, c.finding, c.certainty, c.negated
    FROM items AS i
    JOIN statement_class AS c
        ON c.rule_set_id = $rule_set_id AND c.kind = i.kind AND c.text = i.text
),
mapped AS (
    SELECT
        f.profile_hash, f.kind, f.finding, f.certainty, f.negated,
        m.axis, m.name, m.category, m.rank, m.accepted_when_na,
        NOT f.negated AND (f.certainty = 'certain' OR p.include_uncertain) AS effective,
        f.certainty = 'uncertain' AS is_uncertain,
        m.axis = 'rhythm' AND list_contains(p.pr_not_assessable, m.category) AS na_rhythm
    FROM found AS f
    JOIN rule_finding AS m ON m.rule_set_id = $rule_set_id AND m.finding = f.finding
    CROSS JOIN param AS p
),
labelled AS (
    SELECT
        *,
        CASE
            WHEN axis = 'other' THEN NULL
            WHEN axis = 'unrecognised' THEN 'unrecognised_statement'
            WHEN negated THEN 'negated:' || name
            WHEN is_uncertain AND NOT effective THEN 'uncertain_excluded:' || name
            WHEN is_uncertain THEN 'uncertain:' || name
            WHEN kind = 'code' THEN 'code:' || name
            ELSE 'statement:' || name
        END AS evidence_item
    FROM mapped
),
agg AS (
    SELECT
        profile_hash,
        arg_min(category, rank) FILTER (WHERE axis = 'rhythm' AND effective) AS rhythm_stmt,
        arg_min(name, rank) FILTER (WHERE axis = 'rhythm' AND effective) AS rhythm_finding,
        coalesce(bool_or(axis = 'rhythm' AND is_uncertain), false) AS rhythm_uncertain,
        -- An escape or idioventricular rhythm stated beside an atrial rhythm: the QRS comes
        -- from a ventricular focus, whatever rhythm class the rank gives the read.
        coalesce(bool_or(finding = 'rhythm:ventricular' AND effective), false) AS ventricular_rhythm,
        coalesce(bool_or(na_rhythm AND is_uncertain AND NOT negated AND NOT effective), false)
            AS uncertain_na_rhythm,
        arg_min(category, rank) FILTER (WHERE axis = 'av' AND effective AND category IS NOT NULL)
            AS av_stmt_any,
        arg_min(name, rank) FILTER (WHERE axis = 'av' AND effective AND category IS NOT NULL)
            AS av_stmt_finding,
        arg_min(category, rank) FILTER (WHERE axis = 'av' AND effective AND accepted_when_na)
            AS av_stmt_na,
        coalesce(bool_or(axis = 'av' AND negated), false)
            OR coalesce(bool_or(finding = 'av:none' AND effective), false) AS av_negated,
        coalesce(bool_or(finding = 'av:block_unspecified' AND effective), false)
            AS av_block_unspecified,
        coalesce(bool_or(axis = 'av' AND is_uncertain), false) AS av_uncertain,
        coalesce(bool_or(finding = 'vc:rbbb' AND effective), false) AS s_rbbb,
        coalesce(bool_or(finding = 'vc:incomplete_rbbb' AND effective), false) AS s_incomplete_rbbb,
        coalesce(bool_or(finding = 'vc:lbbb' AND effective), false) AS s_lbbb,
        coalesce(bool_or(finding = 'vc:incomplete_lbbb' AND effective), false) AS s_incomplete_lbbb,
        coalesce(bool_or(finding = 'vc:lafb' AND effective), false) AS s_lafb,
        coalesce(bool_or(finding = 'vc:lpfb' AND effective), false) AS s_lpfb,
        coalesce(bool_or(finding = 'vc:bifascicular' AND effective), false) AS s_bifascicular,
        coalesce(bool_or(finding = 'vc:nonspecific_ivcd' AND effective), false) AS s_ivcd,
        coalesce(bool_or(finding = 'vc:bbb_unspecified' AND effective), false) AS s_bbb_unspecified,
        coalesce(bool_or(axis = 'vc' AND negated), false)
            OR coalesce(bool_or(finding = 'vc:none' AND effective), false) AS vc_negated,
        coalesce(bool_or(axis = 'vc' AND is_uncertain), false) AS vc_uncertain,
        coalesce(bool_or(finding = 'ctx:preexcitation' AND effective), false) AS ctx_preexcitation,
        coalesce(bool_or(finding = 'ctx:rv_hypertrophy' AND effective), false) AS ctx_rv_hypertrophy,
        coalesce(bool_or(finding = 'ctx:lateral_infarct' AND effective), false) AS ctx_lateral_infarct,
        coalesce(bool_or(finding = 'ctx:dextrocardia' AND effective), false) AS ctx_dextrocardia,
        coalesce(bool_or(finding = 'ctx:blocked_pac' AND effective), false) AS ctx_blocked_pac,
        coalesce(bool_or(finding = 'ctx:left_axis_deviation' AND effective), false)
            AS ctx_left_axis_deviation,
        coalesce(bool_or(finding = 'ctx:right_axis_deviation' AND effective), false)
            AS ctx_right_axis_deviation,
        coalesce(bool_or(finding = 'global:normal' AND effective), false) AS global_normal,
        coalesce(bool_or(axis = 'unrecognised'), false) AS has_unrecognised,
        list(DISTINCT name ORDER BY name) FILTER (WHERE axis = 'vc' AND effective) AS vc_stmt_list,
        list(DISTINCT evidence_item ORDER BY evidence_item) FILTER (WHERE evidence_item IS NOT NULL)
            AS stmt_evidence
    FROM labelled
    GROUP BY profile_hash
)
SELECT
    $rule_set_id AS rule_set_id,
    k.profile_hash,
    k.statements,
    k.statement_codes,
    k.n_reads,
    a.rhythm_stmt,
    a.rhythm_finding,
    coalesce(a.ventricular_rhythm, false) AS ventricular_rhythm,
    coalesce(list_contains(p.pr_not_assessable, a.rhythm_stmt), false) AS rhythm_pr_na,
    coalesce(a.rhythm_uncertain, false) AS rhythm_uncertain,
    coalesce(a.uncertain_na_rhythm, false) AS uncertain_na_rhythm,
    CASE
        WHEN list_contains(p.pr_not_assessable, a.rhythm_stmt) THEN a.av_stmt_na
        ELSE a.av_stmt_any
    END AS av_stmt,
    a.av_stmt_finding = 'second_degree'
        AND NOT coalesce(list_contains(p.pr_not_assessable, a.rhythm_stmt), false)
        AS av_subtype_unknown,
    CASE
        WHEN list_contains(p.pr_not_assessable, a.rhythm_stmt)
            AND a.av_stmt_any IS NOT NULL
            AND a.av_stmt_na IS DISTINCT FROM a.av_stmt_any
            THEN 'ignored:' || a.av_stmt_any || '_statement_in_' || a.rhythm_stmt
    END AS av_ignored_evidence,
    coalesce(a.av_negated, false) AS av_negated,
    coalesce(a.av_block_unspecified, false) AS av_block_unspecified,
    coalesce(a.av_uncertain, false) AS av_uncertain,
    coalesce(a.s_rbbb, false) AS s_rbbb,
    coalesce(a.s_incomplete_rbbb, false) AS s_incomplete_rbbb,
    coalesce(a.s_lbbb, false) AS s_lbbb,
    coalesce(a.s_incomplete_lbbb, false) AS s_incomplete_lbbb,
    coalesce(a.s_lafb, false) AS s_lafb,
    coalesce(a.s_lpfb, false) AS s_lpfb,
    coalesce(a.s_bifascicular, false) AS s_bifascicular,
    coalesce(a.s_ivcd, false) AS s_ivcd,
    coalesce(a.s_bbb_unspecified, false) AS s_bbb_unspecified,
    coalesce(a.vc_negated, false) AS vc_negated,
    coalesce(a.vc_uncertain, false) AS vc_uncertain,
    coalesce(a.ctx_preexcitation, false) AS ctx_preexcitation,
    coalesce(a.ctx_rv_hypertrophy, false) AS ctx_rv_hypertrophy,
    coalesce(a.ctx_lateral_infarct, false) AS ctx_lateral_infarct,
    coalesce(a.ctx_dextrocardia, false) AS ctx_dextrocardia,
    coalesce(a.ctx_blocked_pac, false) AS ctx_blocked_pac,
    coalesce(a.ctx_left_axis_deviation, false) AS ctx_left_axis_deviation,
    coalesce(a.ctx_right_axis_deviation, false) AS ctx_right_axis_deviation,
    coalesce(a.global_normal, false) AS global_normal,
    coalesce(a.has_unrecognised, false) AS has_unrecognised,
    coalesce(a.vc_stmt_list, []::VARCHAR[]) AS vc_stmt_list,
    coalesce(a.stmt_evidence, []::VARCHAR[]) AS stmt_evidence
FROM keyed AS k
LEFT JOIN agg AS a ON a.profile_hash = k.profile_hash
CROSS JOIN param AS p
