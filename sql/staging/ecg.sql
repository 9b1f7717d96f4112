-- Stage an ECG export (one row per read of a tracing).
-- Grain: one row per source record. Key: (ecg_key, read_kind).
-- Input: view src, temp tables code_map and ingest_param (ranges, unit factors, date bounds);
-- parameters $timestamp_formats, $statement_separator, $code_separator.
-- Output: temp table stage_checked (typed columns, problems, repairs; raw text is kept only
-- inside problems). Row-local checks only: references to the registry (person known, dates
-- within life, key already loaded) are checked next by ecg_refs.sql on the materialized rows.
CREATE OR REPLACE TEMP TABLE stage_checked AS
WITH typed AS (
    SELECT
        s.row_k,
        dromos_text(s.ecg_key) AS ecg_key,
        dromos_text(s.person_key) AS person_key_raw,
        dromos_person_key(dromos_text(s.person_key)) AS person_key,
        s.acquired_at AS acquired_at_raw,
        CAST(try_strptime(dromos_text(s.acquired_at), $timestamp_formats) AS TIMESTAMP) AS acquired_at,
        dromos_text(s.site) AS site,
        s.read_kind AS read_kind_raw,
        CASE WHEN dromos_text(s.read_kind) IS NULL THEN 'machine' ELSE read_kind_code.code END AS read_kind,
        s.ventricular_rate AS ventricular_rate_raw, dromos_number(s.ventricular_rate) AS ventricular_rate,
        s.atrial_rate AS atrial_rate_raw, dromos_number(s.atrial_rate) AS atrial_rate,
        s.pr_ms AS pr_ms_raw, dromos_interval_ms(s.pr_ms, p.pr_ms_factor, p.seconds_lower, p.seconds_upper) AS pr_ms,
        s.qrs_ms AS qrs_ms_raw, dromos_interval_ms(s.qrs_ms, p.qrs_ms_factor, p.seconds_lower, p.seconds_upper) AS qrs_ms,
        s.qt_ms AS qt_ms_raw, dromos_interval_ms(s.qt_ms, p.qt_ms_factor, p.seconds_lower, p.seconds_upper) AS qt_ms,
        s.qtc_ms AS qtc_ms_raw, dromos_interval_ms(s.qtc_ms, p.qtc_ms_factor, p.seconds_lower, p.seconds_upper) AS qtc_ms,
        s.p_axis AS p_axis_raw, dromos_number(s.p_axis) AS p_axis_value,
        s.qrs_axis AS qrs_axis_raw, dromos_number(s.qrs_axis) AS qrs_axis_value,
        s.t_axis AS t_axis_raw, dromos_number(s.t_axis) AS t_axis_value,
        list_filter(list_transform(string_split(coalesce(s.statements, ''), $statement_separator), lambda x: trim(x)), lambda x: x <> '') AS statements,
        list_filter(list_transform(string_split(coalesce(s.statement_codes, ''), $code_separator), lambda x: trim(x)), lambda x: x <> '') AS statement_codes,
        [
            dromos_repair('pr_ms', s.pr_ms, p.pr_ms_factor, p.seconds_lower, p.seconds_upper, 'interval given in seconds'),
            dromos_repair('qrs_ms', s.qrs_ms, p.qrs_ms_factor, p.seconds_lower, p.seconds_upper, 'interval given in seconds'),
            dromos_repair('qt_ms', s.qt_ms, p.qt_ms_factor, p.seconds_lower, p.seconds_upper, 'interval given in seconds'),
            dromos_repair('qtc_ms', s.qtc_ms, p.qtc_ms_factor, p.seconds_lower, p.seconds_upper, 'interval given in seconds')
        ] AS repair_candidates
    FROM src AS s
    CROSS JOIN ingest_param AS p
    LEFT JOIN code_map AS read_kind_code
        ON read_kind_code.field = 'read_kind' AND read_kind_code.source_value = lower(dromos_text(s.read_kind))
),
checked AS (
    SELECT
        w.row_k, w.ecg_key, w.person_key, w.acquired_at, w.site, w.read_kind, w.ventricular_rate,
        w.atrial_rate, w.pr_ms, w.qrs_ms, w.qt_ms, w.qtc_ms, w.statements, w.statement_codes,
        dromos_axis(w.p_axis_value) AS p_axis,
        dromos_axis(w.qrs_axis_value) AS qrs_axis,
        dromos_axis(w.t_axis_value) AS t_axis,
        list_filter([
            dromos_problem('ecg_key', w.ecg_key, w.ecg_key IS NULL, 'missing required value'),
            dromos_problem('person_key', w.person_key, w.person_key IS NULL, 'missing required value'),
            dromos_problem('acquired_at', w.acquired_at_raw, dromos_text(w.acquired_at_raw) IS NULL, 'missing required value'),
            dromos_problem('acquired_at', w.acquired_at_raw, dromos_text(w.acquired_at_raw) IS NOT NULL AND w.acquired_at IS NULL, 'unparseable date'),
            dromos_problem('acquired_at', w.acquired_at_raw, CAST(w.acquired_at AS DATE) < p.earliest_date OR CAST(w.acquired_at AS DATE) > p.latest_date, 'date out of range'),
            dromos_problem('read_kind', w.read_kind_raw, w.read_kind IS NULL, 'unknown read kind'),
            dromos_number_problem('ventricular_rate', w.ventricular_rate_raw, w.ventricular_rate, p.ventricular_rate_lo, p.ventricular_rate_hi),
            dromos_number_problem('atrial_rate', w.atrial_rate_raw, w.atrial_rate, p.atrial_rate_lo, p.atrial_rate_hi),
            dromos_number_problem('pr_ms', w.pr_ms_raw, w.pr_ms, p.pr_ms_lo, p.pr_ms_hi),
            dromos_number_problem('qrs_ms', w.qrs_ms_raw, w.qrs_ms, p.qrs_ms_lo, p.qrs_ms_hi),
            dromos_number_problem('qt_ms', w.qt_ms_raw, w.qt_ms, p.qt_ms_lo, p.qt_ms_hi),
            dromos_number_problem('qtc_ms', w.qtc_ms_raw, w.qtc_ms, p.qtc_ms_lo, p.qtc_ms_hi),
            dromos_number_problem('p_axis', w.p_axis_raw, w.p_axis_value, p.p_axis_lo, p.p_axis_hi),
            dromos_number_problem('qrs_axis', w.qrs_axis_raw, w.qrs_axis_value, p.qrs_axis_lo, p.qrs_axis_hi),
            dromos_number_problem('t_axis', w.t_axis_raw, w.t_axis_value, p.t_axis_lo, p.t_axis_hi)
        ], lambda x: x IS NOT NULL) AS problems,
        list_filter(w.repair_candidates, lambda x: x IS NOT NULL) AS repairs
    FROM typed AS w
    CROSS JOIN ingest_param AS p
),
hashed AS (
    SELECT
        c.*,
        c.ecg_key || '/' || coalesce(c.read_kind, '?') AS dedup_key,
        c.ecg_key || '/' || coalesce(c.read_kind, '?') AS key_raw,
        hash(c.person_key, c.acquired_at, c.site, c.ventricular_rate, c.atrial_rate, c.pr_ms, c.qrs_ms,
             c.qt_ms, c.qtc_ms, c.p_axis, c.qrs_axis, c.t_axis, c.statements, c.statement_codes) AS content_hash
    FROM checked AS c
)
SELECT * FROM hashed;
