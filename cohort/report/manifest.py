"""manifest.json: what a report was made from, and the hash of everything it wrote.

Sections:

- ``study``: id, title, spec file name, spec text and its sha256;
- ``software``: Dromos version, Python version and the versions of the scientific packages;
- ``seed``;
- ``rule_sets``: per rule set used by any variant: id, the content hash the registry records,
  and every file read for it (the rule file, its ``extends`` bases, the lexicon) with sha256;
- ``registry``: every loaded source file (from ``load_log``: file, kind, target table, sha256,
  mapping hash, row counts, pseudonymization flag) and ``load_log_sha256``, the hash of those
  content columns (clock columns excluded, so loading the same files again gives the same
  hash);
- ``disclosure``: the disclosure log (settings and counts, no values);
- ``outputs``: path, bytes and sha256 of every file of the run folder except this one;
- ``volatile``: the time the manifest was written, the platform and the hash of the full
  load log including its clock columns. It is the only part that changes between re-runs on
  the same inputs; :func:`fingerprint` hashes the manifest without it.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import platform
import sys
from importlib.metadata import PackageNotFoundError, version
from pathlib import Path
from typing import Any

from cohort import __version__
from cohort.report.disclosure import DisclosureLog
from cohort.study.spec import Spec

FORMAT = "dromos-manifest-v1"
MANIFEST_FILE = "manifest.json"
#: Top-level keys excluded from comparisons between runs.
VOLATILE_FIELDS: tuple[str, ...] = ("volatile",)
PACKAGES: tuple[str, ...] = ("dromos", "duckdb", "polars", "pandas", "numpy", "scipy",
                             "statsmodels", "lifelines", "matplotlib", "pyarrow")
LOAD_LOG_COLUMNS: tuple[str, ...] = (
    "source_id", "source_file", "source_kind", "target_table", "sha256", "mapping_hash",
    "rows_read", "rows_loaded", "rows_quarantined", "rows_duplicate", "rows_repaired",
    "pseudonymized", "key_check", "software_version",
)


def sha256_file(path: Path) -> str:
    digest = hashlib.sha256()
    with Path(path).open("rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def sha256_json(value: Any) -> str:
    return hashlib.sha256(json.dumps(value, sort_keys=True, default=str).encode()).hexdigest()


def package_versions() -> dict[str, str | None]:
    out: dict[str, str | None] = {}
    for name in PACKAGES:
        try:
            out[name] = version(name)
        except PackageNotFoundError:
            out[name] = None
    return out


def registry_inputs(con) -> dict[str, Any]:
    """Loaded source files from ``load_log`` and the hash of the log's content columns."""
    if con is None:
        return {"sources": [], "load_log_sha256": None, "note": "no registry connection given"}
    cols = ", ".join(LOAD_LOG_COLUMNS)
    rows = con.execute(f"SELECT {cols} FROM load_log ORDER BY source_id").fetchall()
    sources = [dict(zip(LOAD_LOG_COLUMNS, r, strict=True)) for r in rows]
    return {"sources": sources, "load_log_sha256": sha256_json(sources)}


def _full_load_log_hash(con) -> str | None:
    if con is None:
        return None
    rows = con.execute("SELECT * FROM load_log ORDER BY source_id").fetchall()
    return sha256_json([list(r) for r in rows])


def rule_set_entries(spec: Spec, spec_path: Path | None) -> list[dict[str, Any]]:
    """Every rule set of the spec's variants with the files it was read from."""
    from cohort.phenotype.rules import load_rule_set, resolve_rule_path
    from cohort.report.html import rule_chain

    out = []
    for rule in dict.fromkeys(v.rule_set for v in spec.variants):
        beside = spec_path.parent / rule if spec_path is not None and rule.endswith(".toml") else None
        path = beside if beside is not None and beside.is_file() else resolve_rule_path(rule)
        rs = load_rule_set(path)
        files = [*rule_chain(rs.path), rs.lexicon_path]
        out.append({"id": rs.id, "file": _shown_path(rs.path), "sha256": sha256_file(rs.path),
                    "content_sha256": rs.sha256,
                    "files": [{"path": _shown_path(f), "sha256": sha256_file(f)} for f in files]})
    return out


def _shown_path(path: Path) -> str:
    """Package files as cohort/...; others as given (so manifests compare across machines)."""
    import cohort

    root = Path(cohort.__file__).resolve().parent.parent
    try:
        return str(Path(path).resolve().relative_to(root))
    except ValueError:
        return str(path)


def output_entries(out_dir: Path) -> list[dict[str, Any]]:
    files = sorted(p for p in out_dir.rglob("*") if p.is_file() and p.name != MANIFEST_FILE)
    return [{"path": str(p.relative_to(out_dir)), "bytes": p.stat().st_size, "sha256": sha256_file(p)}
            for p in files]


def build_manifest(out_dir: Path, spec: Spec, *, con, spec_path: Path | None,
                   disclosure: DisclosureLog) -> dict[str, Any]:
    """The manifest document (see module docstring)."""
    text = spec.source.text if spec.source is not None else (spec_path.read_text(encoding="utf-8") if spec_path else "")
    return {
        "format": FORMAT,
        "study": {"id": spec.id, "title": spec.title,
                  "spec_file": spec.path.name if spec.path else (spec_path.name if spec_path else None),
                  "spec_sha256": spec.sha256, "spec_text": text},
        "software": {"dromos": __version__, "python": platform.python_version(),
                     "packages": package_versions()},
        "seed": spec.seed,
        "variants": [{"name": v.name, "rule_set": v.rule_set} for v in spec.variants],
        "rule_sets": rule_set_entries(spec, spec_path),
        "registry": registry_inputs(con),
        "disclosure": disclosure.to_dict(),
        "outputs": output_entries(out_dir),
        "volatile_fields": list(VOLATILE_FIELDS),
        "volatile": {"written_at": dt.datetime.now(dt.UTC).isoformat(timespec="seconds"),
                     "platform": f"{platform.system()} {platform.machine()} ({sys.platform})",
                     "load_log_full_sha256": _full_load_log_hash(con)},
    }


def write_manifest(out_dir: Path, spec: Spec, *, con, spec_path: Path | None,
                   disclosure: DisclosureLog) -> Path:
    """Write ``out_dir/manifest.json``; returns its path."""
    doc = build_manifest(out_dir, spec, con=con, spec_path=spec_path, disclosure=disclosure)
    path = out_dir / MANIFEST_FILE
    path.write_text(json.dumps(doc, indent=2, ensure_ascii=False, default=str) + "\n", encoding="utf-8")
    return path


def fingerprint(doc: dict[str, Any]) -> str:
    """sha256 of a manifest without its volatile fields (equal for re-runs on the same inputs)."""
    return sha256_json({k: v for k, v in doc.items() if k not in VOLATILE_FIELDS})


__all__ = ["FORMAT", "MANIFEST_FILE", "PACKAGES", "VOLATILE_FIELDS", "build_manifest",
           "fingerprint", "output_entries", "package_versions", "registry_inputs",
           "sha256_file", "write_manifest"]
