"""Phenotype stage: rule sets, statement lexicon, per-ECG categories, timelines, explain.

The public functions are imported lazily so that ``import cohort.phenotype.beats`` (the beat
classifier, a separate module of this package) does not load the phenotype runner.
"""

from __future__ import annotations

from importlib import import_module
from typing import Any

_EXPORTS = {
    "run_phenotype": "cohort.phenotype.run",
    "list_unrecognised": "cohort.phenotype.run",
    "summarize": "cohort.phenotype.run",
    "explain_ecg": "cohort.phenotype.explain",
    "format_explanation": "cohort.phenotype.explain",
    "load_rule_set": "cohort.phenotype.rules",
    "available_rule_sets": "cohort.phenotype.rules",
    "load_lexicon": "cohort.phenotype.lexicon",
}

__all__ = sorted(_EXPORTS)


def __getattr__(name: str) -> Any:
    if name in _EXPORTS:
        return getattr(import_module(_EXPORTS[name]), name)
    raise AttributeError(f"module 'cohort.phenotype' has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted([*globals(), *__all__])
