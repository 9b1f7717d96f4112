"""Property tests: arbitrary junk never crashes the loader and counts always reconcile."""

from __future__ import annotations

import tempfile
from pathlib import Path

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from cohort.errors import DromosError
from cohort.ingest.loader import load_file
from cohort.registry import connect
from tests.conftest import ECG_HEADER, PERSON_HEADER, ecg_row, write_csv

# Field text without line breaks or quotes keeps one record per line, so rows read must equal
# the data lines written. Other junk (quotes, raw bytes) must still never crash or lose rows.
_line_safe = st.text(alphabet=st.characters(blacklist_characters='\n\r"', blacklist_categories=("Cs",)), max_size=12)
_junk_row = st.lists(_line_safe, min_size=0, max_size=20)
_settings = settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])


def _fresh(tmp: Path):
    con = connect(tmp / "r.duckdb")
    base = write_csv(tmp / "persons.csv", PERSON_HEADER, [["P1", "1950-01-01", "M", "s", "", "2024-12-31"]])
    load_file(con, base)
    return con


@_settings
@given(rows=st.lists(_junk_row, min_size=1, max_size=15))
def test_junk_rows_reconcile_with_lines_written(rows):
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        con = _fresh(tmp)
        lines = [",".join(r) for r in rows]
        kept = [line for line in lines if line != ""]  # an empty line is not a record
        body = "\n".join([",".join(ECG_HEADER), *lines]) + "\n"
        (tmp / "ecgs.csv").write_text(body, encoding="utf-8")
        try:
            result = load_file(con, tmp / "ecgs.csv")
        except DromosError:
            assert con.execute("SELECT count(*) FROM ecg").fetchone()[0] == 0
            return
        finally_rows = con.execute("SELECT count(*) FROM ecg").fetchone()[0]
        assert result.reconciles
        assert result.rows_read == len(kept)
        assert finally_rows == result.rows_loaded
        quarantined = con.execute("SELECT count(DISTINCT record) FROM quarantine WHERE source_id LIKE 'ecg:%'").fetchone()[0]
        assert quarantined == result.rows_quarantined
        con.close()


@_settings
@given(junk=st.binary(max_size=400), good=st.integers(min_value=0, max_value=3))
def test_arbitrary_bytes_never_crash(junk, good):
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        con = _fresh(tmp)
        path = write_csv(tmp / "ecgs.csv", ECG_HEADER, [ecg_row(f"T{i}", "P1") for i in range(good)])
        with path.open("ab") as handle:
            handle.write(junk)
        try:
            result = load_file(con, path)
        except DromosError:
            return
        assert result.reconciles
        assert con.execute("SELECT count(*) FROM ecg").fetchone()[0] == result.rows_loaded
        con.close()
