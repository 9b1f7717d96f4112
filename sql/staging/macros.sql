-- Helper macros for the staging statements (session-local, never stored in the registry).
-- True when trim(s) = s for sure: ASCII text with no blank at either end (trim also removes
-- Unicode space separators such as U+00A0, so non-ASCII text takes the trim). Trimming copies
-- and scans the text; this test is several times cheaper and most values pass it.
CREATE OR REPLACE TEMP MACRO dromos_untrimmed_ok(s) AS
    NOT starts_with(s, ' ') AND NOT ends_with(s, ' ') AND strlen(s) = length(s);
-- Text of a raw value, trimmed, NULL when empty.
CREATE OR REPLACE TEMP MACRO dromos_text(x) AS
    CASE WHEN dromos_untrimmed_ok(CAST(x AS VARCHAR)) THEN nullif(CAST(x AS VARCHAR), '')
         ELSE nullif(trim(CAST(x AS VARCHAR)), '') END;
CREATE OR REPLACE TEMP MACRO dromos_number(x) AS TRY_CAST(dromos_text(x) AS DOUBLE);
-- A problem record when `failed` is true; NULL otherwise (also when `failed` is NULL).
CREATE OR REPLACE TEMP MACRO dromos_problem(field_name, raw, failed, reason) AS
    CASE WHEN failed THEN {'field': field_name, 'raw_value': CAST(raw AS VARCHAR), 'reason': reason} END;
-- Problems of a numeric field: unparseable, or outside its inclusive [lo, hi] range.
CREATE OR REPLACE TEMP MACRO dromos_number_problem(field_name, raw, value, lo, hi) AS
    CASE
        WHEN dromos_text(raw) IS NOT NULL AND value IS NULL
            THEN {'field': field_name, 'raw_value': CAST(raw AS VARCHAR), 'reason': 'not a number'}
        WHEN value < lo OR value > hi
            THEN {'field': field_name, 'raw_value': CAST(raw AS VARCHAR),
                  'reason': printf('outside plausible range [%g, %g]', lo, hi)}
    END;
-- True when a numeric field passes dromos_number_problem for sure (in range, or no value);
-- false sends the row to the full checks.
CREATE OR REPLACE TEMP MACRO dromos_value_ok(raw, value, lo, hi) AS (value >= lo AND value <= hi) OR raw IS NULL;
-- Interval in ms from a raw value declared in ms (factor 1) or s (factor 1000); a value
-- declared in ms that can only be seconds (see validation rules) is converted.
CREATE OR REPLACE TEMP MACRO dromos_interval_ms(raw, factor, s_lo, s_hi) AS
    CASE
        WHEN factor = 1 AND dromos_number(raw) >= s_lo AND dromos_number(raw) < s_hi
            THEN dromos_number(raw) * 1000
        ELSE dromos_number(raw) * factor
    END;
CREATE OR REPLACE TEMP MACRO dromos_repair(field_name, raw, factor, s_lo, s_hi, rule) AS
    CASE
        WHEN factor = 1 AND dromos_number(raw) >= s_lo AND dromos_number(raw) < s_hi
            THEN {'field': field_name, 'raw_value': CAST(raw AS VARCHAR),
                  'repaired_value': CAST(dromos_number(raw) * 1000 AS VARCHAR), 'rule': rule}
    END;
-- A code map's codes that map to themselves (for dromos_code): what a raw value already in
-- canonical form looks like.
CREATE OR REPLACE TEMP MACRO dromos_exact_codes(codes) AS
    list_filter(map_values(codes), lambda c: c <> '' AND trim(c) = c AND codes[lower(c)] = c);
-- Canonical code of a raw value through a code map (keys: lower-cased source values). A raw
-- value that is already one of the `exact` codes is its own code (same answer, and it spares
-- lower() and the map lookup on most rows); NULL when the value is not mapped.
CREATE OR REPLACE TEMP MACRO dromos_code(x, codes, exact) AS
    CASE WHEN list_contains(exact, x) THEN x ELSE codes[lower(dromos_text(x))] END;
-- Frontal-plane axis in (-180, 180]: machines report -90..270 or -180..180.
CREATE OR REPLACE TEMP MACRO dromos_axis(value) AS CASE WHEN value > 180 THEN value - 360 ELSE value END;
-- Date from text with any of the given formats (a list known when the statement is bound).
CREATE OR REPLACE TEMP MACRO dromos_date(x, formats) AS CAST(try_strptime(dromos_text(x), formats) AS DATE);
-- True when splitting x at sep needs no trimming and drops no empty item (so the plain split
-- is the whole answer): ASCII with no blank at the ends (dromos_untrimmed_ok), no blank next to
-- a separator and no empty item (no separator at an end, none doubled). For a separator with a
-- blank at both ends (' | ') those three tests amount to "no double blank" (each pattern holds
-- one), a single scan. NULL when x is NULL.
CREATE OR REPLACE TEMP MACRO dromos_tidy_list(x, sep) AS
    x <> '' AND dromos_untrimmed_ok(x) AND NOT starts_with(x, sep) AND NOT ends_with(x, sep)
    AND CASE WHEN starts_with(sep, ' ') AND ends_with(sep, ' ') THEN NOT contains(x, '  ')
             ELSE NOT contains(x, sep || sep) AND NOT contains(x, ' ' || sep)
                  AND NOT contains(x, sep || ' ') END;
-- Split a field holding several values; items are trimmed and empty items dropped. Tidy text
-- (dromos_tidy_list) takes the plain split, which is several times cheaper.
CREATE OR REPLACE TEMP MACRO dromos_split(x, sep) AS
    CASE
        WHEN x IS NULL THEN []
        WHEN dromos_tidy_list(x, sep) THEN string_split(x, sep)
        ELSE list_filter(list_transform(string_split(x, sep), lambda item: trim(item)), lambda item: item <> '')
    END;
-- The problem of a CSV line with a wrong number of fields (NULL when the line is fine; see
-- cohort/ingest/sources.py). Such a line's other checks are left out: its fields are shifted.
CREATE OR REPLACE TEMP MACRO dromos_line_problem(problem, raw) AS
    CASE WHEN problem IS NOT NULL THEN {'field': CAST(NULL AS VARCHAR), 'raw_value': raw, 'reason': problem} END;
-- The record number of a staged row: its row_k, or (CSV, no row_k) its position in stage_typed,
-- from the first storage position the loader recorded in variable dromos_first_rowid.
CREATE OR REPLACE TEMP MACRO dromos_row_k(row_k, position) AS
    coalesce(row_k, position - getvariable('dromos_first_rowid') + 1);
