"""The study specs that ship with Dromos (``analyses/*.toml``), found by name or by path."""

from __future__ import annotations

from pathlib import Path

from cohort.errors import SpecError

_PACKAGED = Path(__file__).resolve().parents[1] / "_analyses"
_SOURCE_TREE = Path(__file__).resolve().parents[2] / "analyses"


def analyses_root() -> Path:
    """The ``analyses/`` folder: packaged copy in a wheel, the repository folder in a checkout."""
    return _PACKAGED if _PACKAGED.is_dir() else _SOURCE_TREE


def shipped_specs() -> dict[str, Path]:
    """Shipped spec names (file stem) and their paths, sorted by name."""
    root = analyses_root()
    return {p.stem: p for p in sorted(root.glob("*.toml"))} if root.is_dir() else {}


def resolve_spec(name_or_path: str | Path) -> Path:
    """A spec file path: an existing file as given, else a shipped spec of that name.

    ``prevalence`` and ``prevalence.toml`` both name the shipped prevalence spec; anything
    else that is not a file is a SpecError listing the shipped names.
    """
    path = Path(name_or_path)
    if path.is_file():
        return path
    shipped = shipped_specs()
    stem = path.stem if path.suffix == ".toml" and path.parent == Path(".") else str(path)
    if stem in shipped:
        return shipped[stem]
    names = ", ".join(shipped) or "none found"
    raise SpecError(f"study spec {path} not found; pass the path of a .toml spec or the name "
                    f"of a shipped one ({names})")
