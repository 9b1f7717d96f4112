-- ecg_state (view): the conduction state of each person at each of their ECGs, in time order,
-- for multi-state and time-updated analyses.
-- Grain: one row per ecg_key per rule_set_id, ordered within person by (acquired_at, ecg_key)
-- as ecg_seq. Computed when read (a filter on rule_set_id reaches the per-ECG scan), so a
-- phenotype run does not write a second million-row per-ECG table; the few analyses that use it
-- pay for it. state comes from the rule file's [state] map of the AV category, except 'paced'
-- from the first paced ECG on, or from an implant procedure on or before the ECG date (paced_by
-- says which; the procedure when both); 'paced' is absorbing. state_rank is the position in
-- [state] order (NULL for the unknown state); worst_state_rank_so_far and last_known_state carry
-- the history forward; last_known_pr_ms is the last PR measured where PR was assessable. Other
-- columns: join ecg_conduction by ecg_key and rule_set_id.
WITH
implant AS (
    SELECT r.rule_set_id, x.person_key, min(x.date) AS implant_date
    FROM procedure AS x
    JOIN rule_code AS r
        ON r.list_name = 'pacemaker_implant'
        AND r.code_system = upper(replace(replace(x.code_system, '-', ''), ' ', ''))
        AND r.code = upper(replace(trim(x.code), '.', ''))
    GROUP BY r.rule_set_id, x.person_key
),
ecgs AS (
    SELECT
        c.rule_set_id, c.person_key, c.ecg_key, c.acquired_at, c.av_category, c.av_grade,
        c.pr_assessable, c.pr_ms, g.state AS av_state,
        c.rhythm_class = 'paced' OR c.ventricular_conduction = 'paced' AS paced_ecg
    FROM ecg_conduction AS c
    JOIN rule_category AS g ON g.rule_set_id = c.rule_set_id AND g.av_category = c.av_category
),
first_paced AS (
    SELECT rule_set_id, person_key, min(acquired_at) AS first_paced_at
    FROM ecgs
    WHERE paced_ecg
    GROUP BY rule_set_id, person_key
),
stated AS (
    SELECT
        e.*,
        coalesce(i.implant_date <= CAST(e.acquired_at AS DATE), false) AS after_implant,
        coalesce(e.acquired_at >= f.first_paced_at, false) AS after_paced_ecg
    FROM ecgs AS e
    LEFT JOIN implant AS i ON i.rule_set_id = e.rule_set_id AND i.person_key = e.person_key
    LEFT JOIN first_paced AS f ON f.rule_set_id = e.rule_set_id AND f.person_key = e.person_key
),
ranked AS (
    SELECT
        s.*,
        CASE WHEN s.after_paced_ecg OR s.after_implant THEN 'paced' ELSE s.av_state END AS state,
        CASE
            WHEN s.after_implant THEN 'procedure'
            WHEN s.after_paced_ecg THEN 'ecg'
        END AS paced_by,
        list_position(
            p.state_order,
            CASE WHEN s.after_paced_ecg OR s.after_implant THEN 'paced' ELSE s.av_state END
        ) AS state_rank
    FROM stated AS s
    JOIN rule_param AS p ON p.rule_set_id = s.rule_set_id
)
SELECT
    r.person_key,
    r.ecg_key,
    r.rule_set_id,
    r.acquired_at,
    row_number() OVER w AS ecg_seq,
    r.av_category,
    r.state,
    r.state_rank,
    r.paced_by,
    max(r.state_rank) OVER w AS worst_state_rank_so_far,
    last_value(CASE WHEN r.state_rank IS NOT NULL THEN r.state END IGNORE NULLS) OVER w
        AS last_known_state,
    max(r.av_grade) OVER w AS worst_av_grade_so_far,
    last_value(CASE WHEN r.pr_assessable THEN r.pr_ms END IGNORE NULLS) OVER w
        AS last_known_pr_ms,
    lag(r.acquired_at) OVER w AS previous_acquired_at,
    lead(r.acquired_at) OVER w AS next_acquired_at,
    r.state IS DISTINCT FROM lag(r.state) OVER w AS state_changed
FROM ranked AS r
WINDOW w AS (
    PARTITION BY r.rule_set_id, r.person_key ORDER BY r.acquired_at, r.ecg_key
    ROWS BETWEEN UNBOUNDED PRECEDING AND CURRENT ROW
)
