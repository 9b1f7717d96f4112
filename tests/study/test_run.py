"""End to end on a small synthetic registry: the shipped specs run, write every table with its
documented columns, re-run byte-identically, never write person identifiers."""

from __future__ import annotations

import csv
import json
from pathlib import Path

import polars as pl
import pytest

from cohort.cli import main
from cohort.study import run_spec
from cohort.study.analyses import ANALYSIS_KINDS
from cohort.study.builder import ATTRITION_COLUMNS
from cohort.study.spec import load_spec

ROOT = Path(__file__).resolve().parents[2]
SPECS = ("prevalence.toml", "incidence.toml")


@pytest.fixture(scope="module")
def runs(synthetic_db, tmp_path_factory):
    """Each shipped spec run twice into separate folders."""
    out = {}
    for name in SPECS:
        base = tmp_path_factory.mktemp(name.replace(".toml", ""))
        first = run_spec(ROOT / "analyses" / name, synthetic_db["db"], base / "a")
        second = run_spec(ROOT / "analyses" / name, synthetic_db["db"], base / "b")
        out[name] = (first, second)
    return out


def _files(folder: Path) -> dict[str, bytes]:
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


@pytest.mark.parametrize("name", SPECS)
def test_reruns_are_byte_identical(runs, name):
    first, second = runs[name]
    a, b = _files(first.out_dir), _files(second.out_dir)
    assert a.keys() == b.keys()
    different = [k for k in a if a[k] != b[k]]
    assert not different, different


@pytest.mark.parametrize("name", SPECS)
def test_tables_have_documented_columns_and_every_variant(runs, name):
    result = runs[name][0]
    spec = load_spec(ROOT / "analyses" / name)
    variants = [v.name for v in spec.variants]
    for analysis in spec.analyses:
        kind = ANALYSIS_KINDS[analysis.kind]
        first = next(iter(kind.parts))
        path = result.out_dir / "tables" / f"{analysis.name}.csv"
        header, rows = _read(path)
        assert header == ["variant", *kind.parts[first]]
        assert [v for v in variants if any(r[0] == v for r in rows)] == variants
        assert list(dict.fromkeys(r[0] for r in rows)) == variants  # variants in order, not mixed
    header, rows = _read(result.out_dir / "attrition.csv")
    assert header == ["variant", *ATTRITION_COLUMNS]
    manifest = json.loads((result.out_dir / "run.json").read_text())
    assert manifest["spec_sha256"] == spec.sha256
    assert [v["name"] for v in manifest["variants"]] == variants


def _read(path: Path) -> tuple[list[str], list[list[str]]]:
    with path.open(newline="", encoding="utf-8") as handle:
        rows = list(csv.reader(handle))
    return rows[0], rows[1:]


@pytest.mark.parametrize("name", SPECS)
def test_no_person_identifiers_in_outputs(runs, name, synthetic_db):
    persons = pl.read_csv(synthetic_db["exports"] / "persons.csv")["person_id"].to_list()
    tracings = pl.read_csv(synthetic_db["exports"] / "ecgs.csv", columns=["tracing_id"])["tracing_id"]
    folder = runs[name][0].out_dir
    text = "\n".join(p.read_text(encoding="utf-8") for p in folder.rglob("*.csv"))
    assert not any(pid in text for pid in persons[:200])
    assert not any(tid in text for tid in tracings.head(200).to_list())
    for path in folder.rglob("*.csv"):
        header, _ = _read(path)
        assert not {"person_key", "ecg_key", "birth_date"} & set(header)


def test_prevalence_tables_partition_each_axis(runs):
    result = runs["prevalence.toml"][0]
    est = pl.read_csv(result.out_dir / "tables" / "prevalence_at_index.csv", infer_schema_length=None)
    wilson = est.filter(pl.col("method") == "wilson")
    sums = wilson.group_by("variant", "axis", "stratum", "sex", "age_band").agg(
        pl.col("events").sum(), pl.col("n").first(), pl.col("n").n_unique().alias("k"))
    assert (sums["k"] == 1).all() and (sums["events"] == sums["n"]).all()
    # Overall n equals the persons included (attrition).
    att = pl.read_csv(result.out_dir / "attrition.csv")
    included = att.group_by("variant").agg(pl.col("n_remaining").last())
    overall = wilson.filter(pl.col("stratum") == "overall").group_by("variant").agg(pl.col("n").first())
    assert dict(included.iter_rows()) == dict(overall.iter_rows())


def test_sensitivity_variant_changes_first_degree_only(runs):
    """pr220-v1 moves PR 201-219 ms from first-degree to normal PR: fewer first-degree."""
    est = pl.read_csv(runs["prevalence.toml"][0].out_dir / "tables" / "prevalence_at_index.csv",
                      infer_schema_length=None)
    pick = est.filter((pl.col("stratum") == "overall") & (pl.col("method") == "wilson"))
    value = {(r["variant"], r["category"]): r["events"] for r in pick.iter_rows(named=True)}
    assert value[("pr220", "first_degree")] < value[("main", "first_degree")]
    moved = value[("main", "first_degree")] - value[("pr220", "first_degree")]
    assert value[("pr220", "normal_pr")] - value[("main", "normal_pr")] == moved
    assert value[("pr220", "third_degree")] == value[("main", "third_degree")]


def test_incidence_variants_behave(runs):
    folder = runs["incidence.toml"][0].out_dir
    rates = pl.read_csv(folder / "tables" / "incidence.csv", infer_schema_length=None)
    overall = rates.filter(pl.col("stratum") == "overall")
    py = {(r["variant"], r["endpoint"]): r for r in overall.iter_rows(named=True)}
    # The 90-day lag removes early follow-up: less person-time, no more events.
    for ep in ("higher_grade", "pacemaker"):
        assert py[("lag90", ep)]["person_years"] < py[("main", ep)]["person_years"]
        assert py[("lag90", ep)]["events"] <= py[("main", ep)]["events"]
    att = pl.read_csv(folder / "attrition.csv")
    narrow = att.filter((pl.col("variant") == "narrow_qrs") & (pl.col("criterion") == "qrs_at_least_ms"))
    assert narrow.height == 1 and narrow["n_excluded"][0] > 0
    # Person-time by attained age band adds up to the overall person-time (Lexis split).
    by_age = rates.filter(pl.col("stratum") == "age_band").group_by("variant", "endpoint").agg(
        pl.col("person_years").sum(), pl.col("events").sum())
    for r in by_age.iter_rows(named=True):
        total = py[(r["variant"], r["endpoint"])]
        assert r["person_years"] == pytest.approx(total["person_years"], rel=1e-6)
        assert r["events"] == total["events"]


def test_cli_runs_and_prints_a_summary(synthetic_db, tmp_path, capsys):
    code = main(["run", str(ROOT / "analyses" / "incidence.toml"), "--db", str(synthetic_db["db"]),
                 "--out", str(tmp_path / "cli")])
    out = capsys.readouterr().out
    assert code == 0
    assert "study incidence-demo: 4 variant(s)" in out
    assert "per 1,000" in out and "persons included" in out
    assert (tmp_path / "cli" / "tables" / "incidence_rate_ratios.csv").is_file()
