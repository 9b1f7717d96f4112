-- state_transitions: conduction states of each study person from the entry day on, as
-- sojourns for a multi-state model: normal conduction -> first-degree AV block -> higher-grade
-- block -> pacemaker, death absorbing from each.
-- Grain: one row per (person_key, sojourn) for the persons of study_followup whose state at
-- entry is known; sojourns are (start_day, stop_day] in whole days since the index date,
-- contiguous, with to_state the state entered at stop_day (NULL = censored at stop_day).
-- States: ecg_state of rule set $rule_set_id maps each ECG (from the index date on) to normal,
-- first_degree, mobitz_i, higher_grade or paced; paced becomes 'pacemaker', mobitz_i becomes
-- $mobitz_i_state, 'unknown' (AV conduction not gradable) changes nothing. The pacemaker date
-- of person_conduction (implant code or first paced ECG, also before index) and the death date
-- add their states. The path is the worst state so far (rank order below, never back: a
-- first-degree block that is not seen on a later ECG still counts), so each day on which the
-- worst state rises is a transition; several steps on one day are one jump to the worst
-- (death wins). States on or before entry_day set the state at entry; persons whose state at
-- entry is unknown, or who are dead by then, have no rows. Follow-up ends at end_day.
-- Inputs: study_followup (person_key, index_date, entry_day, end_day), registered by
-- cohort.study.survival_kinds.
WITH
followup AS (
    SELECT person_key, index_date, entry_day, end_day
    FROM study_followup
    WHERE end_day > entry_day
),
ranks AS (
    SELECT * FROM (VALUES
        ('normal', 1),
        ('first_degree', 2),
        ('higher_grade', 3),
        ('pacemaker', 4),
        ('death', 5)
    ) AS t(state, rank)
),
observed AS (
    SELECT
        f.person_key,
        date_diff('day', f.index_date, CAST(s.acquired_at AS DATE)) AS day,
        CASE s.state
            WHEN 'paced' THEN 'pacemaker'
            WHEN 'mobitz_i' THEN $mobitz_i_state
            ELSE s.state
        END AS state
    FROM ecg_state AS s
    JOIN followup AS f ON f.person_key = s.person_key
    WHERE s.rule_set_id = $rule_set_id
        AND CAST(s.acquired_at AS DATE) >= f.index_date
    UNION ALL
    SELECT f.person_key, date_diff('day', f.index_date, t.pacemaker_date), 'pacemaker'
    FROM person_conduction AS t
    JOIN followup AS f ON f.person_key = t.person_key
    WHERE t.rule_set_id = $rule_set_id AND t.pacemaker_date IS NOT NULL
    UNION ALL
    SELECT f.person_key, date_diff('day', f.index_date, p.death_date), 'death'
    FROM person AS p
    JOIN followup AS f ON f.person_key = p.person_key
    WHERE p.death_date IS NOT NULL
),
daily AS (
    SELECT
        o.person_key,
        greatest(o.day, f.entry_day) AS day,
        max(r.rank) AS rank
    FROM observed AS o
    JOIN ranks AS r ON r.state = o.state
    JOIN followup AS f ON f.person_key = o.person_key
    WHERE o.day <= f.end_day
    GROUP BY o.person_key, greatest(o.day, f.entry_day)
),
worst AS (
    SELECT
        person_key,
        day,
        max(rank) OVER (PARTITION BY person_key ORDER BY day
                        ROWS BETWEEN UNBOUNDED PRECEDING AND CURRENT ROW) AS worst,
        max(rank) OVER (PARTITION BY person_key ORDER BY day
                        ROWS BETWEEN UNBOUNDED PRECEDING AND 1 PRECEDING) AS worst_before
    FROM daily
),
changes AS (
    SELECT person_key, day, worst
    FROM worst
    WHERE worst_before IS NULL OR worst > worst_before
),
entered AS (
    SELECT c.person_key
    FROM changes AS c
    JOIN followup AS f ON f.person_key = c.person_key
    WHERE c.day = f.entry_day AND c.worst < 5
),
path AS (
    SELECT
        c.person_key,
        c.day,
        c.worst,
        lead(c.day) OVER w AS next_day,
        lead(c.worst) OVER w AS next_worst
    FROM changes AS c
    JOIN entered AS e ON e.person_key = c.person_key
    WINDOW w AS (PARTITION BY c.person_key ORDER BY c.day)
)
SELECT
    p.person_key,
    row_number() OVER (PARTITION BY p.person_key ORDER BY p.day) AS sojourn,
    fr.state AS from_state,
    tr.state AS to_state,
    p.day AS start_day,
    coalesce(p.next_day, f.end_day) AS stop_day
FROM path AS p
JOIN followup AS f ON f.person_key = p.person_key
JOIN ranks AS fr ON fr.rank = p.worst
LEFT JOIN ranks AS tr ON tr.rank = p.next_worst
WHERE p.worst < 5 AND coalesce(p.next_day, f.end_day) > p.day
ORDER BY p.person_key, sojourn
