"""Beat classifier against the synthetic strip simulator (benchmarks/validate_beats.py).

Slow: run with ``pytest -m slow``. The classifier was written without reading the simulator,
so agreement is an independent check of both; the simulator's truth is the pattern it was
asked to draw.
"""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

import pytest

SCRIPT = Path(__file__).resolve().parents[2] / "benchmarks" / "validate_beats.py"


def _validator():
    if "validate_beats" in sys.modules:
        return sys.modules["validate_beats"]
    spec = importlib.util.spec_from_file_location("validate_beats", SCRIPT)
    module = importlib.util.module_from_spec(spec)
    sys.modules["validate_beats"] = module  # dataclasses look their module up here
    spec.loader.exec_module(module)
    return module


@pytest.mark.slow
@pytest.mark.parametrize(("duration_ms", "n"), [(10_000.0, 200), (6_000.0, 100)])
def test_sensitivity_and_ppv_per_pattern_at_least_95_percent(duration_ms, n):
    vb = _validator()
    v = vb.run_validation(n, seeds=(1, 2, 3), artefacts=(False, True), duration_ms=duration_ms)
    table = vb.format_confusion(v)
    for pattern in vb.PATTERNS:
        assert v.sensitivity(pattern) >= vb.TARGET, f"{pattern} sensitivity\n{table}"
        assert v.ppv(pattern) >= vb.TARGET, f"{pattern} PPV\n{table}"
