"""Shared small exports for the generator tests (generated once per test session)."""

from __future__ import annotations

from pathlib import Path

import pytest

from synthetic_registry import generate


@pytest.fixture(scope="session")
def clean_export(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """3,000 persons, seed 11: every beat pattern occurs at this seed."""
    out = tmp_path_factory.mktemp("synth_clean")
    generate(out, persons=3_000, seed=11)
    return out


@pytest.fixture(scope="session")
def defect_export(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The same registry as clean_export, with 3 % defects."""
    out = tmp_path_factory.mktemp("synth_defects")
    generate(out, persons=3_000, seed=11, defects=0.03)
    return out


@pytest.fixture(scope="session")
def fhir_pair(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    """FHIR and CSV renderings of one small registry (600 persons, seed 4)."""
    fhir = tmp_path_factory.mktemp("synth_fhir")
    flat = tmp_path_factory.mktemp("synth_flat")
    generate(fhir, persons=600, seed=4, fmt="fhir")
    generate(flat, persons=600, seed=4)
    return fhir, flat
