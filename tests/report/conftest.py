"""Fixtures of the report tests: shipped specs run on the small synthetic registry.

Each run folder is written once per session and then only read by the tests.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest

from cohort.registry import connect
from cohort.report.build import ReportResult, write_report
from cohort.study.run import run_spec
from cohort.study.shipped import shipped_specs


def run_with_report(spec_name: str, db: Path, out: Path, *, disclosure: bool = True,
                    threshold: int = 11) -> ReportResult:
    """Run a shipped spec into ``out`` and write its report (as ``dromos run`` does)."""
    result = run_spec(shipped_specs()[spec_name], db, out)
    con = connect(db, create=False, read_only=True)
    try:
        return write_report(result, con=con, disclosure=disclosure, threshold=threshold)
    finally:
        con.close()


@pytest.fixture(scope="session")
def report_runs(synthetic_db, tmp_path_factory) -> dict[str, Path]:
    """Run folders: prevalence, pacemaker and site_quality with disclosure control, the
    prevalence spec once more (determinism) and once without disclosure control (truth)."""
    root = tmp_path_factory.mktemp("reports")
    db = synthetic_db["db"]
    runs = {}
    for name in ("prevalence", "pacemaker", "site_quality"):
        runs[name] = root / name
        run_with_report(name, db, runs[name])
    runs["prevalence_again"] = root / "prevalence_again"
    run_with_report("prevalence", db, runs["prevalence_again"])
    runs["prevalence_exact"] = root / "prevalence_exact"
    run_with_report("prevalence", db, runs["prevalence_exact"], disclosure=False)
    return runs


@pytest.fixture
def copy_of(tmp_path):
    """Copy a run folder into the test's own directory (for tests that rewrite it)."""
    def _copy(folder: Path) -> Path:
        target = tmp_path / folder.name
        shutil.copytree(folder, target)
        return target
    return _copy
