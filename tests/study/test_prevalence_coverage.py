"""Coverage of the prevalence intervals against the synthetic generator's truth (slow).

A smaller version of benchmarks/validate_prevalence_coverage.py: the like-with-like
comparisons (true category at the index ECG vs the pooled true prevalence of the other seeds,
and machine read vs pooled machine read) must come close to the nominal 95% of the Wilson
interval (Wilson EB 1927; its coverage oscillates around the nominal level for small counts,
Newcombe RG 1998 Stat Med 17:857), and Clopper-Pearson must be conservative (>= nominal,
Clopper CJ & Pearson ES 1934).
"""

from __future__ import annotations

import importlib.util
from pathlib import Path

import pytest

BENCH = Path(__file__).resolve().parents[2] / "benchmarks" / "validate_prevalence_coverage.py"


def _load():
    spec = importlib.util.spec_from_file_location("validate_prevalence_coverage", BENCH)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


@pytest.mark.slow
def test_prevalence_intervals_cover_the_true_prevalence(tmp_path):
    bench = _load()
    out = bench.coverage_study(list(range(201, 211)), persons=2000, work=tmp_path, echo=lambda s: None)
    cov = {(r["comparison"], r["method"]): r["coverage"] for r in out["overall"].iter_rows(named=True)}
    # Same persons, same index ECG, same age bands: the true-category counts are the truth file's
    # (up to persons whose index ECG falls on a day where the two age definitions differ).
    d = out["definitions"].row(0, named=True)
    assert d["equal_counts"] >= 0.99 * d["cells"]
    expected = bench.expected_loo_coverage(10)  # about 94.3% with a 9-seed reference
    for comparison in ("true_category_vs_true_prevalence", "machine_vs_machine_prevalence"):
        assert abs(cov[(comparison, "wilson")] - expected) < 0.03, (comparison, cov)
        assert cov[(comparison, "clopper_pearson")] >= cov[(comparison, "wilson")]
