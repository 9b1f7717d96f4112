"""``dromos beats FILE.csv``: text and JSON output, clear errors for bad files."""

from __future__ import annotations

import json

import pytest

from cohort.cli import main
from cohort.vocabulary import BEAT_PATTERNS
from tests.phenotype.test_beats import independent, wenckebach


def _write_strip(path, p, q, *, extra_header: str = "", extra_value: str = ""):
    rows = sorted([(t, "P") for t in p] + [(t, "QRS") for t in q])
    sep = "," if extra_header else ""
    lines = [f"t_ms,kind{sep}{extra_header}"] + [f"{t},{k}{sep}{extra_value}" for t, k in rows]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def test_text_output(tmp_path, capsys):
    path = _write_strip(tmp_path / "strip.csv", *wenckebach([4, 4, 4]))
    assert main(["beats", str(path)]) == 0
    out = capsys.readouterr().out
    assert BEAT_PATTERNS["mobitz_i"] in out
    assert "Conduction ratio: 4:3" in out
    assert "Atrial rate: 75 bpm" in out
    assert "PR 180->260->300 ms then on-time P 4 not conducted" in out
    assert "not_conducted" in out and "conducted" in out  # the per-P table


def test_escape_rate_is_printed_for_complete_block(tmp_path, capsys):
    path = _write_strip(tmp_path / "chb.csv", *independent(12_000, 750, 1579, 100, 450))
    assert main(["beats", str(path)]) == 0
    out = capsys.readouterr().out
    assert BEAT_PATTERNS["third_degree"] in out and "Escape rate: 38 bpm" in out


def test_json_output(tmp_path, capsys):
    path = _write_strip(tmp_path / "strip.csv", *wenckebach([4, 4, 4]), extra_header="tracing_id",
                        extra_value="T-0042")
    assert main(["beats", str(path), "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["pattern"] == "mobitz_i" and data["ratio"] == "4:3"
    assert data["file"] == str(path) and len(data["p_waves"]) == 12
    assert data["evidence"][-1].startswith("PR 180->260->300")


@pytest.mark.parametrize(
    ("content", "message"),
    [
        ("", "empty file"),
        ("time,kind\n100,P\n", "missing column(s) t_ms"),
        ("t_ms,kind\n", "no data rows"),
        ("t_ms,kind\n100,P\nabc,P\n300,T\n400,QRS\n", "2 bad row(s) of 4: row 2 (line 3): t_ms 'abc'"),
        ("t_ms,kind\n100,P\n300,T\n", "row 2 (line 3): kind 'T' is not P or QRS"),
        ("t_ms,kind\nnan,P\n", "t_ms 'nan' is not finite"),
        ("t_ms,kind,ecg_key\n100,P,A\n260,QRS,B\n", "column ecg_key holds 2 strips"),
    ],
)
def test_bad_files_fail_with_a_clear_message(tmp_path, capsys, content, message):
    path = tmp_path / "bad.csv"
    path.write_text(content, encoding="utf-8")
    assert main(["beats", str(path)]) != 0
    err = capsys.readouterr().err
    assert str(path) in err and message in err


def test_missing_file(tmp_path, capsys):
    assert main(["beats", str(tmp_path / "absent.csv")]) != 0
    assert "file not found" in capsys.readouterr().err


def test_not_utf8(tmp_path, capsys):
    path = tmp_path / "latin1.csv"
    path.write_bytes("t_ms,kind\n100,P\n# caf\xe9\n".encode("latin-1"))
    assert main(["beats", str(path)]) != 0
    assert "not UTF-8" in capsys.readouterr().err
