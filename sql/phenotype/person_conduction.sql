-- person_conduction: conduction timeline of each person, wide (one column group per category).
-- Grain: one row per person_key of table `person`, for rule set $rule_set_id (persons without
-- ECGs get n_ecg = 0). Sources, each in its own columns: ECGs (ecg_conduction via
-- person_category), ICD-10-CM diagnoses (rule_code list 'diagnosis') and ICD-10-PCS pacemaker
-- implants (rule_code list 'pacemaker_implant'). Per AV and ventricular category:
-- <axis>_<category>_first_date, _n (ECGs showing it) and _persistent (rule file [persistence]).
-- Higher-grade block is the rule file's [av] higher_grade list (Mobitz I kept apart).
-- pacemaker_date is the earliest of the first implant procedure and the first paced ECG;
-- pacemaker_source says which ('procedure' wins ties). Z95.0 (presence of pacemaker) has its own
-- date and does not set pacemaker_date.
WITH
param AS (
    SELECT * FROM rule_param WHERE rule_set_id = $rule_set_id
),
cats AS (
    SELECT * FROM person_category WHERE rule_set_id = $rule_set_id
),
-- One slot per (axis, category) column group: the wide columns are read from per-person
-- lists by slot (a pivot that stays fast with dozens of columns).
slot AS (
    SELECT * FROM (VALUES
        ('av', 'short_pr', 1),
        ('av', 'normal_pr', 2),
        ('av', 'first_degree', 3),
        ('av', 'marked_first_degree', 4),
        ('av', 'mobitz_i', 5),
        ('av', 'mobitz_ii', 6),
        ('av', 'two_to_one', 7),
        ('av', 'high_grade', 8),
        ('av', 'third_degree', 9),
        ('av', 'av_dissociation', 10),
        ('av', 'not_assessable', 11),
        ('vc', 'normal', 12),
        ('vc', 'incomplete_rbbb', 13),
        ('vc', 'rbbb', 14),
        ('vc', 'incomplete_lbbb', 15),
        ('vc', 'lbbb', 16),
        ('vc', 'lafb', 17),
        ('vc', 'lpfb', 18),
        ('vc', 'bifascicular', 19),
        ('vc', 'nonspecific_ivcd', 20),
        ('vc', 'paced', 21),
        ('vc', 'not_assessable', 22)
    ) AS t(axis, category, slot)
),
-- Each category row flagged when it is a higher-grade AV block (rule file [av] higher_grade).
flagged AS (
    SELECT c.*, c.axis = 'av' AND list_contains(p.higher_grade, c.category) AS higher_grade
    FROM cats AS c
    CROSS JOIN param AS p
),
-- One aggregation per person: totals, the AV block summaries, and one list of structs for the
-- wide columns (no sort: the lookups below go by slot number, and one list keeps slot and
-- values aligned).
per_person AS (
    SELECT
        c.person_key,
        sum(c.n_ecg) FILTER (WHERE c.axis = 'av') AS n_ecg,
        min(c.first_date) FILTER (WHERE c.axis = 'av') AS first_ecg_date,
        max(c.last_date) FILTER (WHERE c.axis = 'av') AS last_ecg_date,
        min(c.first_date) FILTER (WHERE c.axis = 'rhythm' AND c.category = 'paced')
            AS first_paced_rhythm_date,
        min(c.first_date) FILTER (WHERE c.higher_grade) AS first_higher_grade_ecg_date,
        max(c.last_date) FILTER (WHERE c.higher_grade) AS last_higher_grade_ecg_date,
        sum(c.n_ecg) FILTER (WHERE c.higher_grade) AS higher_grade_ecg_n,
        min(c.first_date) FILTER (
            WHERE c.axis = 'av' AND c.category IN ('first_degree', 'marked_first_degree')
        ) AS first_first_degree_or_marked_ecg_date,
        min(c.first_date) FILTER (
            WHERE c.axis = 'av' AND (c.category IN ('first_degree', 'marked_first_degree', 'mobitz_i')
                OR c.higher_grade)
        ) AS first_av_block_ecg_date,
        min(c.first_date) FILTER (WHERE c.axis = 'av' AND c.category = 'third_degree')
            AS first_third_degree_ecg_date,
        list({'slot': s.slot, 'first_date': c.first_date, 'n': c.n_ecg, 'persistent': c.persistent})
            FILTER (WHERE s.slot IS NOT NULL) AS items
    FROM flagged AS c
    LEFT JOIN slot AS s ON s.axis = c.axis AND s.category = c.category
    GROUP BY c.person_key
),
listed AS (
    SELECT
        * EXCLUDE (items),
        list_transform(items, lambda x: x.slot) AS slots,
        list_transform(items, lambda x: x.first_date) AS firsts,
        list_transform(items, lambda x: x.n) AS ns,
        list_transform(items, lambda x: x.persistent) AS persistents
    FROM per_person
),
wide AS (
    SELECT
        l.person_key, l.n_ecg, l.first_ecg_date, l.last_ecg_date, l.first_paced_rhythm_date,
        l.first_av_block_ecg_date, l.first_first_degree_or_marked_ecg_date,
        l.first_higher_grade_ecg_date, l.higher_grade_ecg_n,
        coalesce(
            l.higher_grade_ecg_n >= p.persist_min_ecgs
            AND date_diff('day', l.first_higher_grade_ecg_date, l.last_higher_grade_ecg_date)
                >= p.persist_min_days,
            false
        ) AS higher_grade_persistent,
        l.first_third_degree_ecg_date,
        l.firsts[list_position(l.slots, 1)] AS av_short_pr_first_date,
        coalesce(l.ns[list_position(l.slots, 1)], 0) AS av_short_pr_n,
        coalesce(l.persistents[list_position(l.slots, 1)], false) AS av_short_pr_persistent,
        l.firsts[list_position(l.slots, 2)] AS av_normal_pr_first_date,
        coalesce(l.ns[list_position(l.slots, 2)], 0) AS av_normal_pr_n,
        coalesce(l.persistents[list_position(l.slots, 2)], false) AS av_normal_pr_persistent,
        l.firsts[list_position(l.slots, 3)] AS av_first_degree_first_date,
        coalesce(l.ns[list_position(l.slots, 3)], 0) AS av_first_degree_n,
        coalesce(l.persistents[list_position(l.slots, 3)], false) AS av_first_degree_persistent,
        l.firsts[list_position(l.slots, 4)] AS av_marked_first_degree_first_date,
        coalesce(l.ns[list_position(l.slots, 4)], 0) AS av_marked_first_degree_n,
        coalesce(l.persistents[list_position(l.slots, 4)], false) AS av_marked_first_degree_persistent,
        l.firsts[list_position(l.slots, 5)] AS av_mobitz_i_first_date,
        coalesce(l.ns[list_position(l.slots, 5)], 0) AS av_mobitz_i_n,
        coalesce(l.persistents[list_position(l.slots, 5)], false) AS av_mobitz_i_persistent,
        l.firsts[list_position(l.slots, 6)] AS av_mobitz_ii_first_date,
        coalesce(l.ns[list_position(l.slots, 6)], 0) AS av_mobitz_ii_n,
        coalesce(l.persistents[list_position(l.slots, 6)], false) AS av_mobitz_ii_persistent,
        l.firsts[list_position(l.slots, 7)] AS av_two_to_one_first_date,
        coalesce(l.ns[list_position(l.slots, 7)], 0) AS av_two_to_one_n,
        coalesce(l.persistents[list_position(l.slots, 7)], false) AS av_two_to_one_persistent,
        l.firsts[list_position(l.slots, 8)] AS av_high_grade_first_date,
        coalesce(l.ns[list_position(l.slots, 8)], 0) AS av_high_grade_n,
        coalesce(l.persistents[list_position(l.slots, 8)], false) AS av_high_grade_persistent,
        l.firsts[list_position(l.slots, 9)] AS av_third_degree_first_date,
        coalesce(l.ns[list_position(l.slots, 9)], 0) AS av_third_degree_n,
        coalesce(l.persistents[list_position(l.slots, 9)], false) AS av_third_degree_persistent,
        l.firsts[list_position(l.slots, 10)] AS av_av_dissociation_first_date,
        coalesce(l.ns[list_position(l.slots, 10)], 0) AS av_av_dissociation_n,
        coalesce(l.persistents[list_position(l.slots, 10)], false) AS av_av_dissociation_persistent,
        l.firsts[list_position(l.slots, 11)] AS av_not_assessable_first_date,
        coalesce(l.ns[list_position(l.slots, 11)], 0) AS av_not_assessable_n,
        coalesce(l.persistents[list_position(l.slots, 11)], false) AS av_not_assessable_persistent,
        l.firsts[list_position(l.slots, 12)] AS vc_normal_first_date,
        coalesce(l.ns[list_position(l.slots, 12)], 0) AS vc_normal_n,
        coalesce(l.persistents[list_position(l.slots, 12)], false) AS vc_normal_persistent,
        l.firsts[list_position(l.slots, 13)] AS vc_incomplete_rbbb_first_date,
        coalesce(l.ns[list_position(l.slots, 13)], 0) AS vc_incomplete_rbbb_n,
        coalesce(l.persistents[list_position(l.slots, 13)], false) AS vc_incomplete_rbbb_persistent,
        l.firsts[list_position(l.slots, 14)] AS vc_rbbb_first_date,
        coalesce(l.ns[list_position(l.slots, 14)], 0) AS vc_rbbb_n,
        coalesce(l.persistents[list_position(l.slots, 14)], false) AS vc_rbbb_persistent,
        l.firsts[list_position(l.slots, 15)] AS vc_incomplete_lbbb_first_date,
        coalesce(l.ns[list_position(l.slots, 15)], 0) AS vc_incomplete_lbbb_n,
        coalesce(l.persistents[list_position(l.slots, 15)], false) AS vc_incomplete_lbbb_persistent,
        l.firsts[list_position(l.slots, 16)] AS vc_lbbb_first_date,
        coalesce(l.ns[list_position(l.slots, 16)], 0) AS vc_lbbb_n,
        coalesce(l.persistents[list_position(l.slots, 16)], false) AS vc_lbbb_persistent,
        l.firsts[list_position(l.slots, 17)] AS vc_lafb_first_date,
        coalesce(l.ns[list_position(l.slots, 17)], 0) AS vc_lafb_n,
        coalesce(l.persistents[list_position(l.slots, 17)], false) AS vc_lafb_persistent,
        l.firsts[list_position(l.slots, 18)] AS vc_lpfb_first_date,
        coalesce(l.ns[list_position(l.slots, 18)], 0) AS vc_lpfb_n,
        coalesce(l.persistents[list_position(l.slots, 18)], false) AS vc_lpfb_persistent,
        l.firsts[list_position(l.slots, 19)] AS vc_bifascicular_first_date,
        coalesce(l.ns[list_position(l.slots, 19)], 0) AS vc_bifascicular_n,
        coalesce(l.persistents[list_position(l.slots, 19)], false) AS vc_bifascicular_persistent,
        l.firsts[list_position(l.slots, 20)] AS vc_nonspecific_ivcd_first_date,
        coalesce(l.ns[list_position(l.slots, 20)], 0) AS vc_nonspecific_ivcd_n,
        coalesce(l.persistents[list_position(l.slots, 20)], false) AS vc_nonspecific_ivcd_persistent,
        l.firsts[list_position(l.slots, 21)] AS vc_paced_first_date,
        coalesce(l.ns[list_position(l.slots, 21)], 0) AS vc_paced_n,
        coalesce(l.persistents[list_position(l.slots, 21)], false) AS vc_paced_persistent,
        l.firsts[list_position(l.slots, 22)] AS vc_not_assessable_first_date,
        coalesce(l.ns[list_position(l.slots, 22)], 0) AS vc_not_assessable_n,
        coalesce(l.persistents[list_position(l.slots, 22)], false) AS vc_not_assessable_persistent
    FROM listed AS l
    CROSS JOIN param AS p
),
dx AS (
    SELECT d.person_key, d.date, r.axis, r.category, r.is_higher_grade
    FROM diagnosis AS d
    JOIN rule_code AS r
        ON r.rule_set_id = $rule_set_id
        AND r.list_name = 'diagnosis'
        AND r.code_system = upper(replace(replace(d.code_system, '-', ''), ' ', ''))
        AND r.code = upper(replace(trim(d.code), '.', ''))
),
dx_person AS (
    SELECT
        person_key,
        min(date) FILTER (WHERE axis = 'av') AS first_av_block_dx_date,
        min(date) FILTER (WHERE category = 'first_degree') AS first_first_degree_dx_date,
        min(date) FILTER (WHERE category = 'second_degree') AS first_second_degree_dx_date,
        min(date) FILTER (WHERE is_higher_grade) AS first_higher_grade_dx_date,
        min(date) FILTER (WHERE category = 'third_degree') AS first_third_degree_dx_date,
        min(date) FILTER (WHERE category IN ('rbbb', 'lbbb')) AS first_bundle_branch_block_dx_date,
        min(date) FILTER (WHERE category IN ('lafb', 'lpfb', 'bifascicular', 'trifascicular'))
            AS first_fascicular_block_dx_date
    FROM dx
    GROUP BY person_key
),
pacemaker_procedure AS (
    SELECT x.person_key, min(x.date) AS pacemaker_procedure_date
    FROM procedure AS x
    JOIN rule_code AS r
        ON r.rule_set_id = $rule_set_id
        AND r.list_name = 'pacemaker_implant'
        AND r.code_system = upper(replace(replace(x.code_system, '-', ''), ' ', ''))
        AND r.code = upper(replace(trim(x.code), '.', ''))
    GROUP BY x.person_key
),
pacemaker_presence AS (
    SELECT d.person_key, min(d.date) AS pacemaker_presence_dx_date
    FROM diagnosis AS d
    JOIN rule_code AS r
        ON r.rule_set_id = $rule_set_id
        AND r.list_name = 'pacemaker_presence_dx'
        AND r.code_system = upper(replace(replace(d.code_system, '-', ''), ' ', ''))
        AND r.code = upper(replace(trim(d.code), '.', ''))
    GROUP BY d.person_key
)
SELECT
    pe.person_key,
    $rule_set_id AS rule_set_id,
    coalesce(w.n_ecg, 0) AS n_ecg,
    w.first_ecg_date,
    w.last_ecg_date,
    w.av_short_pr_first_date,
    coalesce(w.av_short_pr_n, 0) AS av_short_pr_n,
    coalesce(w.av_short_pr_persistent, false) AS av_short_pr_persistent,
    w.av_normal_pr_first_date,
    coalesce(w.av_normal_pr_n, 0) AS av_normal_pr_n,
    coalesce(w.av_normal_pr_persistent, false) AS av_normal_pr_persistent,
    w.av_first_degree_first_date,
    coalesce(w.av_first_degree_n, 0) AS av_first_degree_n,
    coalesce(w.av_first_degree_persistent, false) AS av_first_degree_persistent,
    w.av_marked_first_degree_first_date,
    coalesce(w.av_marked_first_degree_n, 0) AS av_marked_first_degree_n,
    coalesce(w.av_marked_first_degree_persistent, false) AS av_marked_first_degree_persistent,
    w.av_mobitz_i_first_date,
    coalesce(w.av_mobitz_i_n, 0) AS av_mobitz_i_n,
    coalesce(w.av_mobitz_i_persistent, false) AS av_mobitz_i_persistent,
    w.av_mobitz_ii_first_date,
    coalesce(w.av_mobitz_ii_n, 0) AS av_mobitz_ii_n,
    coalesce(w.av_mobitz_ii_persistent, false) AS av_mobitz_ii_persistent,
    w.av_two_to_one_first_date,
    coalesce(w.av_two_to_one_n, 0) AS av_two_to_one_n,
    coalesce(w.av_two_to_one_persistent, false) AS av_two_to_one_persistent,
    w.av_high_grade_first_date,
    coalesce(w.av_high_grade_n, 0) AS av_high_grade_n,
    coalesce(w.av_high_grade_persistent, false) AS av_high_grade_persistent,
    w.av_third_degree_first_date,
    coalesce(w.av_third_degree_n, 0) AS av_third_degree_n,
    coalesce(w.av_third_degree_persistent, false) AS av_third_degree_persistent,
    w.av_av_dissociation_first_date,
    coalesce(w.av_av_dissociation_n, 0) AS av_av_dissociation_n,
    coalesce(w.av_av_dissociation_persistent, false) AS av_av_dissociation_persistent,
    w.av_not_assessable_first_date,
    coalesce(w.av_not_assessable_n, 0) AS av_not_assessable_n,
    coalesce(w.av_not_assessable_persistent, false) AS av_not_assessable_persistent,
    w.vc_normal_first_date,
    coalesce(w.vc_normal_n, 0) AS vc_normal_n,
    coalesce(w.vc_normal_persistent, false) AS vc_normal_persistent,
    w.vc_incomplete_rbbb_first_date,
    coalesce(w.vc_incomplete_rbbb_n, 0) AS vc_incomplete_rbbb_n,
    coalesce(w.vc_incomplete_rbbb_persistent, false) AS vc_incomplete_rbbb_persistent,
    w.vc_rbbb_first_date,
    coalesce(w.vc_rbbb_n, 0) AS vc_rbbb_n,
    coalesce(w.vc_rbbb_persistent, false) AS vc_rbbb_persistent,
    w.vc_incomplete_lbbb_first_date,
    coalesce(w.vc_incomplete_lbbb_n, 0) AS vc_incomplete_lbbb_n,
    coalesce(w.vc_incomplete_lbbb_persistent, false) AS vc_incomplete_lbbb_persistent,
    w.vc_lbbb_first_date,
    coalesce(w.vc_lbbb_n, 0) AS vc_lbbb_n,
    coalesce(w.vc_lbbb_persistent, false) AS vc_lbbb_persistent,
    w.vc_lafb_first_date,
    coalesce(w.vc_lafb_n, 0) AS vc_lafb_n,
    coalesce(w.vc_lafb_persistent, false) AS vc_lafb_persistent,
    w.vc_lpfb_first_date,
    coalesce(w.vc_lpfb_n, 0) AS vc_lpfb_n,
    coalesce(w.vc_lpfb_persistent, false) AS vc_lpfb_persistent,
    w.vc_bifascicular_first_date,
    coalesce(w.vc_bifascicular_n, 0) AS vc_bifascicular_n,
    coalesce(w.vc_bifascicular_persistent, false) AS vc_bifascicular_persistent,
    w.vc_nonspecific_ivcd_first_date,
    coalesce(w.vc_nonspecific_ivcd_n, 0) AS vc_nonspecific_ivcd_n,
    coalesce(w.vc_nonspecific_ivcd_persistent, false) AS vc_nonspecific_ivcd_persistent,
    w.vc_paced_first_date,
    coalesce(w.vc_paced_n, 0) AS vc_paced_n,
    coalesce(w.vc_paced_persistent, false) AS vc_paced_persistent,
    w.vc_not_assessable_first_date,
    coalesce(w.vc_not_assessable_n, 0) AS vc_not_assessable_n,
    coalesce(w.vc_not_assessable_persistent, false) AS vc_not_assessable_persistent,
    w.first_av_block_ecg_date,
    w.first_first_degree_or_marked_ecg_date,
    w.first_higher_grade_ecg_date,
    coalesce(w.higher_grade_ecg_n, 0) AS higher_grade_ecg_n,
    coalesce(w.higher_grade_persistent, false) AS higher_grade_persistent,
    w.first_third_degree_ecg_date,
    x.first_av_block_dx_date,
    x.first_first_degree_dx_date,
    x.first_second_degree_dx_date,
    x.first_higher_grade_dx_date,
    x.first_third_degree_dx_date,
    x.first_bundle_branch_block_dx_date,
    x.first_fascicular_block_dx_date,
    pp.pacemaker_procedure_date,
    w.first_paced_rhythm_date AS pacemaker_ecg_date,
    least(pp.pacemaker_procedure_date, w.first_paced_rhythm_date) AS pacemaker_date,
    CASE
        WHEN pp.pacemaker_procedure_date IS NOT NULL
            AND (w.first_paced_rhythm_date IS NULL
                OR pp.pacemaker_procedure_date <= w.first_paced_rhythm_date)
            THEN 'procedure'
        WHEN w.first_paced_rhythm_date IS NOT NULL THEN 'paced_ecg'
    END AS pacemaker_source,
    pz.pacemaker_presence_dx_date
FROM person AS pe
LEFT JOIN wide AS w ON w.person_key = pe.person_key
LEFT JOIN dx_person AS x ON x.person_key = pe.person_key
LEFT JOIN pacemaker_procedure AS pp ON pp.person_key = pe.person_key
LEFT JOIN pacemaker_presence AS pz ON pz.person_key = pe.person_key
