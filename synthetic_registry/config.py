"""Generator configuration read from the data files beside this module.

Parameters live in ``data/parameters.toml`` as ``{ value, source }`` leaves so that every
number the generator uses has its provenance next to it and is copied to the truth files.
"""

from __future__ import annotations

import csv
import tomllib
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path
from typing import Any

import numpy as np

DATA_DIR = Path(__file__).with_name("data")


@dataclass(frozen=True)
class Sites:
    """The fictional sites: names and per-site export habits (arrays aligned by site index)."""

    name: np.ndarray
    kind: np.ndarray
    share: np.ndarray
    upper_case: np.ndarray
    codes_share: np.ndarray
    overread_share: np.ndarray
    fhir_interval_unit: np.ndarray


@dataclass(frozen=True)
class Lexicon:
    """Statement variants per concept, flattened for vectorized sampling.

    For read kind k, ``texts[k][j]`` is variant j and ``keys[k][j]`` equals
    concept index + cumulative weight within the concept (in (0, 1]), so that
    ``searchsorted(keys, concept + u)`` with u uniform in (0, 1) samples a variant.
    """

    concepts: tuple[str, ...]
    index: dict[str, int]
    texts: dict[str, np.ndarray]
    keys: dict[str, np.ndarray]
    snomed: tuple[str, ...]
    means: tuple[tuple[str, ...], ...]  # what each concept asserts (statements.toml `means`)


@dataclass(frozen=True)
class Config:
    """Parameters, sites, lexicon and code list."""

    params: dict[str, Any]
    sites: Sites
    lexicon: Lexicon
    codes: tuple[dict[str, str], ...]

    def value(self, *path: str) -> Any:
        """The ``value`` of the parameter at ``path`` (e.g. ``"hazard", "death", "gamma"``)."""
        node: Any = self.params
        for key in path:
            node = node[key]
        return node["value"]

    def parameters_with_sources(self) -> dict[str, Any]:
        """Flat mapping ``dotted.path -> {value, source}`` for truth/parameters.json."""
        out: dict[str, Any] = {}
        _flatten(self.params, "", out)
        return out


def _flatten(node: dict[str, Any], prefix: str, out: dict[str, Any]) -> None:
    for key, val in node.items():
        path = f"{prefix}{key}"
        if isinstance(val, dict) and set(val) == {"value", "source"}:
            out[path] = {"value": val["value"], "source": val["source"]}
        elif isinstance(val, dict):
            _flatten(val, path + ".", out)


def _load_sites(path: Path) -> Sites:
    with path.open(encoding="utf-8", newline="") as fh:
        rows = list(csv.DictReader(fh))
    share = np.array([float(r["share"]) for r in rows])
    return Sites(
        name=np.array([r["site"] for r in rows], dtype=object),
        kind=np.array([r["kind"] for r in rows], dtype=object),
        share=share / share.sum(),
        upper_case=np.array([r["machine_style"] == "upper" for r in rows]),
        codes_share=np.array([float(r["codes_share"]) for r in rows]),
        overread_share=np.array([float(r["overread_share"]) for r in rows]),
        fhir_interval_unit=np.array([r["fhir_interval_unit"] for r in rows], dtype=object),
    )


def _load_lexicon(path: Path) -> Lexicon:
    with path.open("rb") as fh:
        raw = tomllib.load(fh)
    concepts = tuple(raw)
    texts: dict[str, np.ndarray] = {}
    keys: dict[str, np.ndarray] = {}
    for kind in ("machine", "confirmed"):
        t: list[str] = []
        k: list[float] = []
        for ci, name in enumerate(concepts):
            variants = raw[name][kind]
            w = np.array([float(v[1]) for v in variants])
            cum = np.cumsum(w) / w.sum()
            cum[-1] = 1.0
            t.extend(str(v[0]) for v in variants)
            k.extend(ci + cum)
        texts[kind] = np.array(t, dtype=object)
        keys[kind] = np.array(k)
    return Lexicon(
        concepts=concepts,
        index={c: i for i, c in enumerate(concepts)},
        texts=texts,
        keys=keys,
        snomed=tuple(str(raw[c].get("snomed", "")) for c in concepts),
        means=tuple(tuple(str(m) for m in raw[c].get("means", ())) for c in concepts),
    )


def _load_codes(path: Path) -> tuple[dict[str, str], ...]:
    with path.open(encoding="utf-8", newline="") as fh:
        return tuple(dict(r) for r in csv.DictReader(fh))


@lru_cache(maxsize=1)
def load_config() -> Config:
    """Read the data files once per process."""
    with (DATA_DIR / "parameters.toml").open("rb") as fh:
        params = tomllib.load(fh)
    return Config(
        params=params,
        sites=_load_sites(DATA_DIR / "sites.csv"),
        lexicon=_load_lexicon(DATA_DIR / "statements.toml"),
        codes=_load_codes(DATA_DIR / "codes.csv"),
    )
