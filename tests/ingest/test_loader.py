"""Ingest of flat CSV/Parquet exports: every validation rule, duplicates, reloads, reconciliation."""

from __future__ import annotations

import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from cohort.errors import InputFileError, MappingError
from cohort.ingest.loader import ingest, load_file
from cohort.ingest.mapping import load_mapping
from tests.conftest import ECG_HEADER, PERSON_HEADER, ecg_row, write_csv


def _quarantine(con, source_id=None):
    return con.execute(
        "SELECT record, field, raw_value, reason FROM quarantine ORDER BY record, field"
    ).fetchall()


def _assert_log_reconciles(con):
    bad = con.execute(
        "SELECT count(*) FROM load_log WHERE rows_read <> rows_loaded + rows_quarantined + rows_duplicate"
    ).fetchone()[0]
    assert bad == 0


def test_clean_files_load_completely(registry, persons_file, tmp_path):
    ecgs = write_csv(tmp_path / "ecgs.csv", ECG_HEADER, [ecg_row("T1", "P1"), ecg_row("T2", "P3")])
    results = ingest(registry, [ecgs, persons_file])  # order given does not matter
    assert [r.table for r in results] == ["person", "ecg"]
    assert [(r.rows_read, r.rows_loaded) for r in results] == [(3, 3), (2, 2)]
    row = registry.execute("SELECT pr_ms, statements, acquired_at FROM ecg WHERE ecg_key = 'T1'").fetchone()
    assert row[0] == 164.0 and row[1] == ["Sinus rhythm", "Normal ECG"]
    assert str(row[2]) == "2015-06-01 09:30:00"
    _assert_log_reconciles(registry)


def test_person_rules_quarantine_with_reasons(registry, tmp_path):
    path = write_csv(
        tmp_path / "persons.csv",
        PERSON_HEADER,
        [
            ["A", "19xx-01-01", "M", "s", "", "2024-12-31"],  # unparseable date
            ["B", "1950-01-01", "Q", "s", "", "2024-12-31"],  # unknown sex code
            ["C", "1950-01-01", "F", "s", "1949-01-01", "2024-12-31"],  # death before birth
            ["D", "1950-01-01", "F", "s", "", ""],  # missing end of follow-up
            ["E", "1950-01-01", "F", "s", "2030-01-01", "2024-12-31"],  # death after end of follow-up
            ["", "1950-01-01", "F", "s", "", "2024-12-31"],  # missing id
            ["G", "1950-01-01", "", "s", "", "2024-12-31"],  # empty sex -> U (not a defect)
        ],
    )
    result = load_file(registry, path)
    assert (result.rows_read, result.rows_loaded, result.rows_quarantined) == (7, 1, 6)
    reasons = {record: reason for record, _, _, reason in _quarantine(registry)}
    assert reasons[1] == "unparseable date"
    assert reasons[2] == "unknown sex code"
    assert reasons[3] == "death before birth"
    assert reasons[4] == "missing required value"
    assert "death after end of follow-up" in {r for rec, _, _, r in _quarantine(registry) if rec == 5}
    assert reasons[6] == "missing required value"
    assert registry.execute("SELECT sex FROM person WHERE person_key = 'G'").fetchone() == ("U",)


@pytest.mark.parametrize(
    ("column", "value", "loaded"),
    [
        # Plausible-range boundaries of cohort/ingest/validation-v1.toml (inclusive).
        ("pr_ms", 40, True), ("pr_ms", 39.5, False), ("pr_ms", 800, True), ("pr_ms", 801, False),
        ("qrs_ms", 300, True), ("qrs_ms", 2500, False),
        ("vent_rate", 15, True), ("vent_rate", -5, False), ("vent_rate", 900, False),
        ("qt_ms", 0, False), ("qtc_ms", 800, True),
        ("pr_ms", "abc", False), ("pr_ms", "", True),  # not a number / missing is allowed
    ],
)
def test_measurement_ranges(registry, persons_file, tmp_path, column, value, loaded):
    load_file(registry, persons_file)
    path = write_csv(tmp_path / "ecgs.csv", ECG_HEADER, [ecg_row("T1", "P1", **{column: value})])
    result = load_file(registry, path)
    assert result.rows_loaded == int(loaded)
    assert result.reconciles


def test_interval_in_seconds_is_repaired_and_recorded(registry, persons_file, tmp_path):
    # 1 s = 1000 ms (SI definition); a PR of 0.182 can only be seconds: no PR is under 40 ms
    # (common practice, no source).
    load_file(registry, persons_file)
    path = write_csv(tmp_path / "ecgs.csv", ECG_HEADER, [ecg_row("T1", "P1", pr_ms="0.182", qrs_ms="0.094")])
    result = load_file(registry, path)
    assert (result.rows_loaded, result.rows_repaired) == (1, 1)
    assert registry.execute("SELECT pr_ms, qrs_ms FROM ecg").fetchone() == (182.0, 94.0)
    repairs = registry.execute("SELECT field, raw_value, repaired_value, rule FROM repair ORDER BY field").fetchall()
    assert repairs == [
        ("pr_ms", "0.182", "182.0", "interval given in seconds"),
        ("qrs_ms", "0.094", "94.0", "interval given in seconds"),
    ]


def test_tiny_interval_is_not_guessed(registry, persons_file, tmp_path):
    # 0.01 is neither a plausible interval in ms nor in s: quarantined, not repaired.
    load_file(registry, persons_file)
    result = load_file(registry, write_csv(tmp_path / "ecgs.csv", ECG_HEADER, [ecg_row("T1", "P1", pr_ms="0.01")]))
    assert (result.rows_loaded, result.rows_repaired, result.rows_quarantined) == (0, 0, 1)


def test_ecg_rules(registry, persons_file, tmp_path):
    load_file(registry, persons_file)
    rows = [
        ecg_row("T1", "P9"),  # unknown person
        ecg_row("T2", "P1", acquired_at="31/02/2019 25:00"),  # unparseable
        ecg_row("T3", "P1", acquired_at="1940-01-01T10:00:00"),  # before birth (P1 born 1948)
        ecg_row("T4", "P2", acquired_at="2022-01-01T10:00:00"),  # after death (2021-04-02)
        ecg_row("T5", "P1", read_kind="draft"),  # unknown read kind
        ecg_row("T6", "P1", acquired_at="2021-04-03T08:00:00"),  # clean
    ]
    result = load_file(registry, write_csv(tmp_path / "ecgs.csv", ECG_HEADER, rows))
    reasons = {record: reason for record, _, _, reason in _quarantine(registry)}
    assert reasons[1].startswith("unknown person")
    assert reasons[2] == "unparseable date"
    assert reasons[3] == "acquired before birth"
    assert reasons[4] == "acquired after death"
    assert reasons[5] == "unknown read kind"
    assert (result.rows_loaded, result.rows_quarantined) == (1, 5)


def test_axis_is_normalized_to_minus_180_plus_180(registry, persons_file, tmp_path):
    # An axis of 270 degrees is the same direction as -90 (geometry; common practice, no source).
    load_file(registry, persons_file)
    load_file(registry, write_csv(tmp_path / "ecgs.csv", ECG_HEADER, [ecg_row("T1", "P1", qrs_axis=270, p_axis=180)]))
    assert registry.execute("SELECT qrs_axis, p_axis FROM ecg").fetchone() == (-90.0, 180.0)


def test_malformed_and_non_utf8_lines_are_quarantined_with_line_numbers(registry, persons_file, tmp_path):
    load_file(registry, persons_file)
    path = write_csv(tmp_path / "ecgs.csv", ECG_HEADER, [ecg_row("T1", "P1"), ecg_row("T2", "P1")])
    with path.open("ab") as handle:
        handle.write(b"T3,P1,2015-06-01T09:30:00,only,four\n")  # record 3: too few fields
        handle.write(",".join(map(str, ecg_row("T4", "P1", site="Caf\udce9"))).encode("utf-8", "surrogateescape") + b"\n")
        handle.write(b",".join(str(v).encode() for v in ecg_row("T5", "P1")) + b",extra\n")  # record 5
        handle.write(b",".join(str(v).encode() for v in ecg_row("T6", "P1")) + b"\n")
    result = load_file(registry, path)
    assert (result.rows_read, result.rows_loaded, result.rows_quarantined) == (6, 3, 3)
    got = {record: reason for record, _, _, reason in _quarantine(registry)}
    assert got == {
        3: "malformed line (missing columns)",
        4: "invalid UTF-8 bytes in the line",
        5: "malformed line (too many columns)",
    }
    assert sorted(r[0] for r in registry.execute("SELECT ecg_key FROM ecg").fetchall()) == ["T1", "T2", "T6"]


def test_duplicates_within_file_and_against_registry(registry, persons_file, tmp_path):
    load_file(registry, persons_file)
    first = write_csv(tmp_path / "ecgs_a.csv", ECG_HEADER, [
        ecg_row("T1", "P1"),
        ecg_row("T1", "P1", read_kind="confirmed", pr_ms=210),
        ecg_row("T1", "P1", read_kind="confirmed", pr_ms=210),  # re-sent confirmed read
        ecg_row("T1", "P1", pr_ms=170),  # same key, other content: conflict
    ])
    result = load_file(registry, first)
    assert (result.rows_loaded, result.rows_duplicate, result.rows_quarantined) == (2, 1, 1)
    conflict = _quarantine(registry)[0]
    assert conflict[0] == 4 and "conflicts with an earlier row" in conflict[3]
    second = write_csv(tmp_path / "ecgs_b.csv", ECG_HEADER, [
        ecg_row("T1", "P1"),  # already in registry, identical
        ecg_row("T1", "P1", read_kind="confirmed", pr_ms=230),  # registry holds another version
        ecg_row("T9", "P3"),
    ])
    result = load_file(registry, second)
    assert (result.rows_loaded, result.rows_duplicate, result.rows_quarantined) == (1, 1, 1)
    assert registry.execute("SELECT count(*) FROM ecg").fetchone()[0] == 3
    _assert_log_reconciles(registry)


def test_repeated_reads_are_compared_by_their_statement_lists(registry, persons_file, tmp_path):
    """Content is compared after splitting and trimming: spacing alone is no difference."""
    load_file(registry, persons_file)
    first = write_csv(tmp_path / "ecgs_a.csv", ECG_HEADER, [
        ecg_row("T1", "P1", statements="Sinus rhythm | RBBB", statement_codes="SNOMED:1;SNOMED:2"),
        ecg_row("T1", "P1", statements=" Sinus rhythm |  RBBB ", statement_codes="SNOMED:1 ; SNOMED:2"),
        ecg_row("T1", "P1", statements="Sinus rhythm | LBBB", statement_codes="SNOMED:1;SNOMED:2"),
        ecg_row("T1", "P1", statements="Sinus rhythm | RBBB", statement_codes="SNOMED:1"),
    ])
    result = load_file(registry, first)
    assert (result.rows_loaded, result.rows_duplicate, result.rows_quarantined) == (1, 1, 2)
    assert [r[0] for r in _quarantine(registry)] == [3, 4]
    second = write_csv(tmp_path / "ecgs_b.csv", ECG_HEADER, [
        ecg_row("T1", "P1", statements="Sinus rhythm | RBBB | ", statement_codes=";SNOMED:1;SNOMED:2;"),
        ecg_row("T1", "P1", read_kind="confirmed", statements="Sinus rhythm"),
    ])
    result = load_file(registry, second)
    assert (result.rows_loaded, result.rows_duplicate, result.rows_quarantined) == (1, 1, 0)
    third = write_csv(tmp_path / "ecgs_c.csv", ECG_HEADER, [
        ecg_row("T1", "P1", read_kind="confirmed", statements="Sinus rhythm | RBBB"),
    ])
    result = load_file(registry, third)
    assert (result.rows_loaded, result.rows_duplicate, result.rows_quarantined) == (0, 0, 1)
    stored = registry.execute(
        "SELECT read_kind, statements, statement_codes FROM ecg ORDER BY read_kind"
    ).fetchall()
    assert stored == [("confirmed", ["Sinus rhythm"], []),
                      ("machine", ["Sinus rhythm", "RBBB"], ["SNOMED:1", "SNOMED:2"])]
    _assert_log_reconciles(registry)


def test_confirmed_read_supersedes_machine_read_in_the_downstream_view(registry, persons_file, tmp_path):
    load_file(registry, persons_file)
    load_file(registry, write_csv(tmp_path / "ecgs.csv", ECG_HEADER, [
        ecg_row("T1", "P1", pr_ms=196, statements="Sinus rhythm"),
        ecg_row("T1", "P1", read_kind="confirmed", pr_ms=214, statements="Sinus rhythm | First degree AV block"),
        ecg_row("T2", "P1"),
    ]))
    rows = registry.execute("SELECT ecg_key, read_kind, pr_ms FROM ecg_read ORDER BY ecg_key").fetchall()
    assert rows == [("T1", "confirmed", 214.0), ("T2", "machine", 164.0)]
    assert registry.execute("SELECT count(*) FROM ecg").fetchone()[0] == 3  # both reads kept


def test_reloading_the_same_file_loads_nothing_new(registry, persons_file):
    first = load_file(registry, persons_file)
    again = load_file(registry, persons_file)
    assert first.rows_loaded == 3 and again.skipped and again.rows_loaded == 0
    assert registry.execute("SELECT count(*) FROM load_log").fetchone()[0] == 1
    assert registry.execute("SELECT count(*) FROM person").fetchone()[0] == 3


def test_same_rows_in_a_renamed_file_are_duplicates(registry, persons_file, tmp_path):
    load_file(registry, persons_file)
    copy = tmp_path / "persons_resent.csv"
    copy.write_bytes(persons_file.read_bytes() + b"P4,1980-01-01,M,x,,2024-12-31\n")
    result = load_file(registry, copy)
    assert (result.rows_loaded, result.rows_duplicate) == (1, 3)


def test_ecgs_before_persons_in_one_call_still_resolve(registry, persons_file, tmp_path):
    ecgs = write_csv(tmp_path / "ecgs.csv", ECG_HEADER, [ecg_row("T1", "P1")])
    results = ingest(registry, [tmp_path])
    assert [r.table for r in results] == ["person", "ecg"] and results[1].rows_loaded == 1
    assert ecgs.exists()


def test_waves_procedures_and_diagnoses(registry, persons_file, tmp_path):
    load_file(registry, persons_file)
    load_file(registry, write_csv(tmp_path / "ecgs.csv", ECG_HEADER, [ecg_row("T1", "P1")]))
    waves = write_csv(tmp_path / "wave_events.csv", ["tracing_id", "t_ms", "kind"], [
        ["T1", 0, "P"], ["T1", 160, "QRS"], ["T1", 160, "QRS"], ["T1", 800, "T"], ["T8", 0, "P"], ["T1", -5, "P"],
    ])
    result = load_file(registry, waves)
    assert (result.rows_loaded, result.rows_duplicate, result.rows_quarantined) == (2, 1, 3)
    procedures = write_csv(tmp_path / "procedures.csv", ["person_id", "procedure_date", "code_system", "code"], [
        ["P1", "2019-03-04", "ICD-10-PCS", "0jh606z"], ["P1", "1900-13-01", "ICD-10-PCS", "0JH606Z"], ["P7", "2019-03-04", "ICD-10-PCS", "0JH606Z"],
    ])
    result = load_file(registry, procedures)
    assert (result.rows_loaded, result.rows_quarantined) == (1, 2)
    assert registry.execute("SELECT code FROM procedure").fetchone() == ("0JH606Z",)  # codes upper-cased
    diagnoses = write_csv(tmp_path / "diagnoses.csv", ["person_id", "diagnosis_date", "code_system", "code"], [
        ["P1", "2018-01-01", "ICD-10-CM", "I44.0"], ["P1", "2018-01-01", "ICD-10-CM", "I44.0"],
    ])
    result = load_file(registry, diagnoses)
    assert (result.rows_loaded, result.rows_duplicate) == (1, 1)
    _assert_log_reconciles(registry)


def test_parquet_source_loads_like_csv(registry, tmp_path):
    table = pa.table({
        "person_id": ["P1", "P2"], "birth_date": pa.array(["1950-01-01", "bad"]),
        "sex": ["M", "F"], "site": ["x", "y"], "death_date": [None, None],
        "followup_end": ["2024-12-31", "2024-12-31"],
    })
    path = tmp_path / "persons.parquet"
    pq.write_table(table, path)
    result = load_file(registry, path)
    assert (result.rows_read, result.rows_loaded, result.rows_quarantined) == (2, 1, 1)
    assert _quarantine(registry)[0][:2] == (2, "birth_date")


def test_foreign_layout_with_seconds_and_day_first_dates(registry, tmp_path):
    from pathlib import Path

    mapping = load_mapping(Path(__file__).resolve().parents[2] / "docs" / "examples" / "foreign-mapping.toml")
    (tmp_path / "patients_2024.csv").write_text(
        "PatNo;DOB;Gender;Clinic;DateOfDeath;LastContact\n"
        "K-001;03.04.1951;1;Kestrel;;31.12.2024\nK-002;17/11/1966;2;Kestrel;;31.12.2024\n", encoding="utf-8")
    (tmp_path / "ecg_measurements_2024.csv").write_text(
        "ExamID;PatNo;AcqTime;Clinic;Status;HR;ARate;PR_s;QRSd_s;QT_s;QTc_s;PAx;RAx;TAx;Interpretation\n"
        "E1;K-001;05.06.2019 10:15;Kestrel;CONFIRMED;62;62;0,214;0.102;0.41;0.42;40;-50;30;Sinus rhythm~1st degree AV block\n"
        "E2;K-002;05.06.2019 11:15;Kestrel;AUTO;75;75;0.158;0.088;0.38;0.41;55;60;45;Sinus rhythm\n",
        encoding="utf-8")
    results = ingest(registry, [tmp_path], mapping=mapping)
    assert [(r.table, r.rows_loaded, r.rows_quarantined) for r in results] == [("person", 2, 0), ("ecg", 1, 1)]
    row = registry.execute("SELECT pr_ms, qrs_ms, read_kind, statements FROM ecg").fetchone()
    assert row == (158.0, 88.0, "machine", ["Sinus rhythm"])  # decimal comma "0,214" quarantined
    assert _quarantine(registry)[0][1:] == ("PR_s", "0,214", "not a number")


def test_missing_mapped_column_is_a_clear_error(registry, tmp_path):
    path = tmp_path / "persons.csv"
    path.write_text("id,birth_date\n1,1950-01-01\n", encoding="utf-8")
    with pytest.raises(MappingError, match="person_id.*not in the file"):
        load_file(registry, path)
    assert registry.execute("SELECT count(*) FROM load_log").fetchone()[0] == 0


def test_a_file_of_only_unreadable_lines_is_refused(registry, tmp_path):
    path = tmp_path / "persons.csv"
    path.write_bytes(b"person_id,birth_date,sex,site,death_date,followup_end\n\xff\xfe,1,2\n")
    with pytest.raises(InputFileError, match="no line could be read"):
        load_file(registry, path)
    assert registry.execute("SELECT count(*) FROM person").fetchone()[0] == 0


def test_failure_mid_load_leaves_registry_unchanged(registry, persons_file, tmp_path, monkeypatch):
    from cohort.ingest import loader

    load_file(registry, persons_file)
    before = registry.execute("SELECT count(*) FROM load_log").fetchone()[0]
    real = loader._write_outcomes

    def write_then_fail(con, *args):
        real(con, *args)
        raise RuntimeError("disk full")

    monkeypatch.setattr(loader, "_write_outcomes", write_then_fail)
    path = write_csv(tmp_path / "ecgs.csv", ECG_HEADER, [ecg_row("T1", "P1"), ecg_row("T2", "P9")])
    with pytest.raises(RuntimeError):
        load_file(registry, path)
    counts = registry.execute("SELECT (SELECT count(*) FROM ecg), (SELECT count(*) FROM quarantine), (SELECT count(*) FROM load_log)").fetchone()
    assert counts == (0, 0, before)
    monkeypatch.setattr(loader, "_write_outcomes", real)
    assert load_file(registry, path).rows_loaded == 1


def test_records_keep_file_order_in_a_file_read_on_several_threads(registry, tmp_path):
    """Records are numbered by position among staged rows; a file large enough to be read in
    parallel must still report each defect at its own line (common practice, no source)."""
    registry.execute("SET threads = 4")
    n, long_site = 220_000, "Clinique des Quatre Vents " + "x" * 200  # ~57 MB: several read blocks
    bad_dates = {5, 100_003, 219_998}
    extra_field, repeat_of, repeated_at = 150_001, 10, 200_000
    path = tmp_path / "persons.csv"
    with path.open("w", encoding="utf-8") as handle:
        handle.write(",".join(PERSON_HEADER) + "\n")
        for record in range(1, n + 1):
            person = f"Q{repeat_of if record == repeated_at else record}"
            birth = "19xx-01-01" if record in bad_dates else "1950-01-01"
            line = f"{person},{birth},F,{long_site},,2024-12-31"
            handle.write(line + ("," if record == extra_field else "") + "\n")
    result = load_file(registry, path)
    assert (result.rows_read, result.rows_quarantined, result.rows_duplicate) == (n, 4, 1)
    got = {record: reason for record, _, _, reason in _quarantine(registry)}
    assert got == {**{r: "unparseable date" for r in bad_dates},
                   extra_field: "malformed line (too many columns)"}
    duplicate = registry.execute("SELECT record, reason FROM duplicate").fetchall()
    assert duplicate == [(repeated_at, "repeats an earlier row of this file")]
    _assert_log_reconciles(registry)


def test_record_numbers_count_empty_lines(registry, tmp_path):
    """A record is numbered by its file line minus the header; empty lines are not records but
    still count as lines (common practice, no source)."""
    path = tmp_path / "persons.csv"
    path.write_text(
        ",".join(PERSON_HEADER) + "\n"
        "P1,1950-01-01,M,s,,2024-12-31\n\n\n"
        "P2,19xx-01-01,F,s,,2024-12-31\n"  # file line 5: record 4
        "P3,1960-01-01,F,s,,2024-12-31\n",
        encoding="utf-8",
    )
    result = load_file(registry, path)
    assert (result.rows_read, result.rows_loaded, result.rows_quarantined) == (3, 2, 1)
    assert [(r[0], r[3]) for r in _quarantine(registry)] == [(4, "unparseable date")]


def test_quoted_line_breaks_in_a_field_still_load(registry, persons_file, tmp_path):
    """A statement with a line break inside quotes is one field (RFC 4180, section 2.6)."""
    load_file(registry, persons_file)
    path = write_csv(tmp_path / "ecgs.csv", ECG_HEADER, [
        ecg_row("T1", "P1", statements="Sinus rhythm\nwith first degree AV block"),
        ecg_row("T2", "P1"),
    ])
    result = load_file(registry, path)
    assert (result.rows_read, result.rows_loaded) == (2, 2)
    statements = registry.execute("SELECT statements FROM ecg WHERE ecg_key = 'T1'").fetchone()[0]
    assert statements == ["Sinus rhythm\nwith first degree AV block"]
