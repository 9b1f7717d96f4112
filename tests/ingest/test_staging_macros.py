"""The staging macros' fast paths give exactly what their plain definitions give.

``dromos_text`` and ``dromos_split`` skip DuckDB's ``trim`` for tidy text, and ``dromos_code`` the
map lookup for a value already canonical; these tests compare them with the plain definitions
(trim every value, split and trim every item, look every value up) over every Unicode code
point at either end of a value, over generated separated lists and over generated code maps.
"""

from __future__ import annotations

import functools

import duckdb
from hypothesis import given, settings
from hypothesis import strategies as st

from cohort.sqlfiles import read_sql


@functools.cache
def _session() -> duckdb.DuckDBPyConnection:
    con = duckdb.connect()
    con.execute("CREATE TEMP MACRO dromos_person_key(x) AS x")  # macros.sql may refer to it
    con.execute(read_sql("staging/macros.sql"))
    return con


def test_text_equals_trim_for_every_code_point_at_either_end():
    con = _session()
    mismatches = con.execute(
        """
        WITH cp AS (SELECT range AS c FROM range(1, 1114112) WHERE range NOT BETWEEN 55296 AND 57343),
        v AS (SELECT chr(c::INTEGER) || x || chr(c::INTEGER) AS s FROM cp, (VALUES ('a'), (''), ('ab c')) t(x)
              UNION ALL SELECT 'a' || chr(c::INTEGER) FROM cp
              UNION ALL SELECT chr(c::INTEGER) || 'a' FROM cp)
        SELECT count(*) FROM v WHERE dromos_text(s) IS DISTINCT FROM nullif(trim(s), '')
        """
    ).fetchone()[0]
    assert mismatches == 0


def test_text_of_empty_blank_and_null_values():
    con = _session()
    got = con.execute(
        "SELECT dromos_text(NULL), dromos_text(''), dromos_text('   '), dromos_text(' P1 '), "
        "dromos_text(42), dromos_text('Hôpital ')"
    ).fetchone()
    assert got == (None, None, None, "P1", "42", "Hôpital")


def _plain_split(con, text: str | None, sep: str) -> list[str]:
    return con.execute(
        "SELECT CASE WHEN $x IS NULL THEN [] ELSE list_filter(list_transform(string_split($x, $sep), "
        "lambda i: trim(i)), lambda i: i <> '') END",
        {"x": text, "sep": sep},
    ).fetchone()[0]


_pieces = st.lists(
    st.sampled_from(["a", "AV block", " ", "  ", "\u00a0", "\u3000", "é", "", "|", ";", " | ", "\t", "x y"]),
    max_size=8,
)


@settings(max_examples=200, deadline=None)
@given(pieces=_pieces, sep=st.sampled_from([" | ", ";", "|", "; ", " ;", " "]))
def test_split_equals_plain_split(pieces, sep):
    con = _session()
    for text in ("".join(pieces), sep.join(pieces)):
        got = con.execute("SELECT dromos_split($x, $sep)", {"x": text, "sep": sep}).fetchone()[0]
        assert got == _plain_split(con, text, sep), (text, sep)


def test_split_of_empty_and_null():
    con = _session()
    assert con.execute("SELECT dromos_split('', ';'), dromos_split(NULL, ';')").fetchone() == ([], [])


_CODE_MAPS = [
    {"machine": "machine", "confirmed": "confirmed", "overread": "confirmed"},
    {"p": "P", "qrs": "QRS", "r": "QRS"},
    {"m": "M", "male": "M", "1": "M", "f": "F", "2": "F"},
    {"m": "F", "male": "M"},  # a source value equal to another code, mapped elsewhere
    {},
]


@settings(max_examples=300, deadline=None)
@given(codes=st.sampled_from(_CODE_MAPS),
       raw=st.one_of(st.none(), st.sampled_from(["machine", "Machine", " machine ", "confirmed", "overread",
                                                 "P", "p", "QRS", " QRS", "R", "M", "m", "F", "male", "1",
                                                 "2", "", " ", "\u00a0M", "x"]), st.text(max_size=4)))
def test_code_equals_the_plain_map_lookup(codes, raw):
    con = _session()
    got, plain = con.execute(
        """
        WITH m AS (SELECT CAST(MAP(CAST($k AS VARCHAR[]), CAST($v AS VARCHAR[])) AS MAP(VARCHAR, VARCHAR)) AS codes)
        SELECT dromos_code($raw, codes, dromos_exact_codes(codes)), codes[lower(dromos_text($raw))] FROM m
        """,
        {"k": list(codes), "v": list(codes.values()), "raw": raw},
    ).fetchone()
    assert got == plain
