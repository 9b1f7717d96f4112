"""Seeded generator of synthetic ECG registry exports from a fictional health network.

The public names are loaded lazily so that ``import synthetic_registry.strips`` stays light
(the strip simulator is used alone by the beat classifier's tests).
"""

from __future__ import annotations

from typing import Any

__all__ = ["StripTruth", "generate", "simulate_strip"]


def __getattr__(name: str) -> Any:
    if name == "generate":
        from synthetic_registry.generator import generate

        return generate
    if name in ("simulate_strip", "StripTruth"):
        from synthetic_registry import strips

        return getattr(strips, name)
    raise AttributeError(f"module 'synthetic_registry' has no attribute {name!r}")
