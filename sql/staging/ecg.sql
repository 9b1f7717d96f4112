-- Stage an ECG export (one row per read of a tracing).
-- Grain: one row per source record. Key: (ecg_key, read_kind).
-- Input: view src, temp tables code_map and ingest_param (ranges, unit factors, date bounds);
-- parameter $timestamp_formats; the view stage_checked reads the session variables
-- dromos_statement_separator and dromos_code_separator.
-- Output: temp table stage_typed (typed columns, problems, repairs, statement text; other raw
-- text is kept only inside problems; exposed as view stage_checked). Row-local checks only:
-- references to the registry (person known, dates within life, key already loaded) are
-- checked next by ecg_refs.sql on the materialized rows. No hash join between src and the
-- output (the code lookup is a map): rows stay in file order, which is how CSV records are
-- numbered.
-- Each raw value is parsed once; problem and repair lists are built only for rows that have one
-- (most rows are clean, and building lists for every row dominated the cost): a cheap `clean`
-- test runs on every row, the full checks only where it fails.
CREATE OR REPLACE TEMP TABLE stage_typed AS
WITH read_kind_codes AS (
    SELECT codes, dromos_exact_codes(codes) AS exact
    FROM (SELECT map_from_entries(list((source_value, code))) AS codes FROM code_map WHERE field = 'read_kind')
),
parsed AS (
    SELECT
        s.row_k,
        s.line_problem,
        s.line_raw,
        dromos_text(s.ecg_key) AS ecg_key,
        dromos_person_key(dromos_text(s.person_key)) AS person_key,
        s.acquired_at AS acquired_at_raw,
        CAST(try_strptime(dromos_text(s.acquired_at), $timestamp_formats) AS TIMESTAMP) AS acquired_at,
        dromos_text(s.site) AS site,
        s.read_kind AS read_kind_raw,
        CASE WHEN s.read_kind IS NULL THEN 'machine' ELSE dromos_code(s.read_kind, rk.codes, rk.exact) END AS read_kind,
        s.ventricular_rate AS ventricular_rate_raw, TRY_CAST(s.ventricular_rate AS DOUBLE) AS ventricular_rate,
        s.atrial_rate AS atrial_rate_raw, TRY_CAST(s.atrial_rate AS DOUBLE) AS atrial_rate,
        s.pr_ms AS pr_ms_raw, TRY_CAST(s.pr_ms AS DOUBLE) AS pr_value,
        s.qrs_ms AS qrs_ms_raw, TRY_CAST(s.qrs_ms AS DOUBLE) AS qrs_value,
        s.qt_ms AS qt_ms_raw, TRY_CAST(s.qt_ms AS DOUBLE) AS qt_value,
        s.qtc_ms AS qtc_ms_raw, TRY_CAST(s.qtc_ms AS DOUBLE) AS qtc_value,
        s.p_axis AS p_axis_raw, TRY_CAST(s.p_axis AS DOUBLE) AS p_axis_value,
        s.qrs_axis AS qrs_axis_raw, TRY_CAST(s.qrs_axis AS DOUBLE) AS qrs_axis_value,
        s.t_axis AS t_axis_raw, TRY_CAST(s.t_axis AS DOUBLE) AS t_axis_value,
        s.statements AS statements_text,
        s.statement_codes AS statement_codes_text,
        -- an interval declared in ms that can only be seconds (validation rules) is converted
        p.pr_ms_factor = 1 AND pr_value >= p.seconds_lower AND pr_value < p.seconds_upper AS pr_in_seconds,
        p.qrs_ms_factor = 1 AND qrs_value >= p.seconds_lower AND qrs_value < p.seconds_upper AS qrs_in_seconds,
        p.qt_ms_factor = 1 AND qt_value >= p.seconds_lower AND qt_value < p.seconds_upper AS qt_in_seconds,
        p.qtc_ms_factor = 1 AND qtc_value >= p.seconds_lower AND qtc_value < p.seconds_upper AS qtc_in_seconds,
        p.pr_ms_factor, p.qrs_ms_factor, p.qt_ms_factor, p.qtc_ms_factor
    FROM src AS s
    CROSS JOIN ingest_param AS p
    CROSS JOIN read_kind_codes AS rk
),
converted AS (
    SELECT
        *,
        CASE WHEN pr_in_seconds THEN pr_value * 1000 ELSE pr_value * pr_ms_factor END AS pr_ms,
        CASE WHEN qrs_in_seconds THEN qrs_value * 1000 ELSE qrs_value * qrs_ms_factor END AS qrs_ms,
        CASE WHEN qt_in_seconds THEN qt_value * 1000 ELSE qt_value * qt_ms_factor END AS qt_ms,
        CASE WHEN qtc_in_seconds THEN qtc_value * 1000 ELSE qtc_value * qtc_ms_factor END AS qtc_ms
    FROM parsed
),
found AS (
    -- clean: every check below passes (cheap tests first); only other rows get the full list
    SELECT
        c.*,
        c.ecg_key IS NOT NULL AND c.person_key IS NOT NULL AND c.read_kind IS NOT NULL
            AND CAST(c.acquired_at AS DATE) BETWEEN p.earliest_date AND p.latest_date
            AND dromos_value_ok(c.ventricular_rate_raw, c.ventricular_rate, p.ventricular_rate_lo, p.ventricular_rate_hi)
            AND dromos_value_ok(c.atrial_rate_raw, c.atrial_rate, p.atrial_rate_lo, p.atrial_rate_hi)
            AND dromos_value_ok(c.pr_ms_raw, c.pr_ms, p.pr_ms_lo, p.pr_ms_hi)
            AND dromos_value_ok(c.qrs_ms_raw, c.qrs_ms, p.qrs_ms_lo, p.qrs_ms_hi)
            AND dromos_value_ok(c.qt_ms_raw, c.qt_ms, p.qt_ms_lo, p.qt_ms_hi)
            AND dromos_value_ok(c.qtc_ms_raw, c.qtc_ms, p.qtc_ms_lo, p.qtc_ms_hi)
            AND dromos_value_ok(c.p_axis_raw, c.p_axis_value, p.p_axis_lo, p.p_axis_hi)
            AND dromos_value_ok(c.qrs_axis_raw, c.qrs_axis_value, p.qrs_axis_lo, p.qrs_axis_hi)
            AND dromos_value_ok(c.t_axis_raw, c.t_axis_value, p.t_axis_lo, p.t_axis_hi) AS clean
    FROM converted AS c
    CROSS JOIN ingest_param AS p
)
SELECT
    c.row_k, c.ecg_key, c.person_key, c.acquired_at, c.site, c.read_kind, c.ventricular_rate, c.atrial_rate,
    c.pr_ms, c.qrs_ms, c.qt_ms, c.qtc_ms,
    dromos_axis(c.p_axis_value) AS p_axis,
    dromos_axis(c.qrs_axis_value) AS qrs_axis,
    dromos_axis(c.t_axis_value) AS t_axis,
    -- split into lists in the view below, when copied into the registry (and by ecg_content.sql)
    c.statements_text, c.statement_codes_text,
    coalesce(dromos_tidy_list(c.statements_text, getvariable('dromos_statement_separator')), true)
        AND coalesce(dromos_tidy_list(c.statement_codes_text, getvariable('dromos_code_separator')), true)
        AS lists_tidy,
    CASE WHEN line_problem IS NOT NULL THEN [dromos_line_problem(line_problem, line_raw)]
         WHEN clean THEN []
         ELSE list_filter([
            dromos_problem('ecg_key', c.ecg_key, c.ecg_key IS NULL, 'missing required value'),
            dromos_problem('person_key', c.person_key, c.person_key IS NULL, 'missing required value'),
            dromos_problem('acquired_at', c.acquired_at_raw, c.acquired_at IS NULL AND dromos_text(c.acquired_at_raw) IS NULL, 'missing required value'),
            dromos_problem('acquired_at', c.acquired_at_raw, c.acquired_at IS NULL AND dromos_text(c.acquired_at_raw) IS NOT NULL, 'unparseable date'),
            dromos_problem('acquired_at', c.acquired_at_raw, CAST(c.acquired_at AS DATE) < p.earliest_date OR CAST(c.acquired_at AS DATE) > p.latest_date, 'date out of range'),
            dromos_problem('read_kind', c.read_kind_raw, c.read_kind IS NULL, 'unknown read kind'),
            dromos_number_problem('ventricular_rate', c.ventricular_rate_raw, c.ventricular_rate, p.ventricular_rate_lo, p.ventricular_rate_hi),
            dromos_number_problem('atrial_rate', c.atrial_rate_raw, c.atrial_rate, p.atrial_rate_lo, p.atrial_rate_hi),
            dromos_number_problem('pr_ms', c.pr_ms_raw, c.pr_ms, p.pr_ms_lo, p.pr_ms_hi),
            dromos_number_problem('qrs_ms', c.qrs_ms_raw, c.qrs_ms, p.qrs_ms_lo, p.qrs_ms_hi),
            dromos_number_problem('qt_ms', c.qt_ms_raw, c.qt_ms, p.qt_ms_lo, p.qt_ms_hi),
            dromos_number_problem('qtc_ms', c.qtc_ms_raw, c.qtc_ms, p.qtc_ms_lo, p.qtc_ms_hi),
            dromos_number_problem('p_axis', c.p_axis_raw, c.p_axis_value, p.p_axis_lo, p.p_axis_hi),
            dromos_number_problem('qrs_axis', c.qrs_axis_raw, c.qrs_axis_value, p.qrs_axis_lo, p.qrs_axis_hi),
            dromos_number_problem('t_axis', c.t_axis_raw, c.t_axis_value, p.t_axis_lo, p.t_axis_hi)
         ], lambda x: x IS NOT NULL)
    END AS problems,
    CASE WHEN pr_in_seconds OR qrs_in_seconds OR qt_in_seconds OR qtc_in_seconds THEN list_filter([
        CASE WHEN pr_in_seconds THEN {'field': 'pr_ms', 'raw_value': pr_ms_raw, 'repaired_value': CAST(pr_ms AS VARCHAR), 'rule': 'interval given in seconds'} END,
        CASE WHEN qrs_in_seconds THEN {'field': 'qrs_ms', 'raw_value': qrs_ms_raw, 'repaired_value': CAST(qrs_ms AS VARCHAR), 'rule': 'interval given in seconds'} END,
        CASE WHEN qt_in_seconds THEN {'field': 'qt_ms', 'raw_value': qt_ms_raw, 'repaired_value': CAST(qt_ms AS VARCHAR), 'rule': 'interval given in seconds'} END,
        CASE WHEN qtc_in_seconds THEN {'field': 'qtc_ms', 'raw_value': qtc_ms_raw, 'repaired_value': CAST(qtc_ms AS VARCHAR), 'rule': 'interval given in seconds'} END
    ], lambda x: x IS NOT NULL) ELSE [] END AS repairs
FROM found AS c
CROSS JOIN ingest_param AS p;

-- The staged rows as the checks see them (classify.sql): the record's row_k (its position for a
-- CSV source, see loader._check_positions), its storage position, its key (and a hash of it),
-- and the statement lists, split from their text when read (the separators are session
-- variables set by the loader). The content hash is ecg_content.sql's, for the few records
-- that need one. Rows with tidy lists take the plain split; the others (few) dromos_split, in
-- their own branch: a CASE holding its lambdas would cost on every row.
CREATE OR REPLACE TEMP VIEW stage_checked AS
SELECT
    * EXCLUDE (statements_text, statement_codes_text, lists_tidy) REPLACE (dromos_row_k(row_k, rowid) AS row_k),
    coalesce(string_split(statements_text, getvariable('dromos_statement_separator')), []) AS statements,
    coalesce(string_split(statement_codes_text, getvariable('dromos_code_separator')), []) AS statement_codes,
    rowid AS position,
    row(ecg_key, read_kind) AS dedup_key,
    hash(ecg_key, read_kind) AS key_hash
FROM stage_typed
WHERE lists_tidy
UNION ALL
SELECT
    * EXCLUDE (statements_text, statement_codes_text, lists_tidy) REPLACE (dromos_row_k(row_k, rowid) AS row_k),
    dromos_split(statements_text, getvariable('dromos_statement_separator')) AS statements,
    dromos_split(statement_codes_text, getvariable('dromos_code_separator')) AS statement_codes,
    rowid AS position,
    row(ecg_key, read_kind) AS dedup_key,
    hash(ecg_key, read_kind) AS key_hash
FROM stage_typed
WHERE NOT lists_tidy;
