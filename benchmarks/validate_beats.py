"""Validate the beat classifier against the synthetic strip simulator.

Simulates ``--n`` strips per pattern for each seed, with artefacts off and on (jitter, missed
or extra P detections, premature beats: whatever the simulator injects), classifies them with
``cohort.phenotype.beats.classify_strip`` and prints a confusion matrix with sensitivity and
positive predictive value per pattern (target >= 0.95 each).

    python benchmarks/validate_beats.py --n 200 --seeds 1 2 3
    python benchmarks/validate_beats.py --show-failures 5      # study misclassified strips

The classifier was written without reading the simulator (independent check); disagreements
are studied strip by strip before deciding which side is wrong.
"""

from __future__ import annotations

import argparse
import sys
from collections import Counter
from dataclasses import dataclass, field

import numpy as np

from cohort.phenotype.beats import classify_strip
from cohort.vocabulary import BEAT_PATTERNS
from synthetic_registry.strips import PATTERNS, simulate_strip

TARGET = 0.95
SHORT = {"normal": "normal", "first_degree": "1st", "mobitz_i": "M-I", "mobitz_ii": "M-II",
         "two_to_one": "2:1", "high_grade": "HG", "third_degree": "3rd", "blocked_pac": "bPAC",
         "av_dissociation": "AVD", "indeterminate": "indet"}


@dataclass
class Validation:
    """Confusion counts (true pattern, predicted pattern) and the misclassified strips."""

    confusion: Counter = field(default_factory=Counter)
    failures: list = field(default_factory=list)

    def sensitivity(self, pattern: str) -> float:
        n = sum(v for (t, _), v in self.confusion.items() if t == pattern)
        return self.confusion[(pattern, pattern)] / n if n else float("nan")

    def ppv(self, pattern: str) -> float:
        n = sum(v for (_, p), v in self.confusion.items() if p == pattern)
        return self.confusion[(pattern, pattern)] / n if n else float("nan")

    def worst(self) -> float:
        """Smallest sensitivity or PPV over the simulated patterns."""
        return min(min(self.sensitivity(p), self.ppv(p)) for p in PATTERNS)


def run_validation(n_per_pattern: int = 200, seeds: tuple[int, ...] = (1, 2, 3),
                   artefacts: tuple[bool, ...] = (False, True),
                   duration_ms: float = 10_000.0) -> Validation:
    """Simulate, classify and count; every (seed, artefacts) pair has its own Generator."""
    out = Validation()
    for seed in seeds:
        for with_artefacts in artefacts:
            rng = np.random.default_rng([seed, int(with_artefacts)])
            for pattern in PATTERNS:
                for _ in range(n_per_pattern):
                    truth = simulate_strip(pattern, rng, duration_ms=duration_ms,
                                           artefacts=with_artefacts)
                    res = classify_strip(truth.p_ms, truth.qrs_ms)
                    out.confusion[(truth.pattern, res.pattern)] += 1
                    if res.pattern != truth.pattern:
                        out.failures.append((truth, res))
    return out


def format_confusion(v: Validation) -> str:
    """Confusion matrix (rows: simulated, columns: classified) with sensitivity and PPV."""
    predicted = [p for p in BEAT_PATTERNS if any(k[1] == p for k in v.confusion)]
    abbrev = SHORT
    head = f"{'simulated / classified':24s}" + "".join(f"{abbrev[p]:>9s}" for p in predicted)
    lines = [head + f"{'sens':>7s}{'PPV':>7s}"]
    for t in PATTERNS:
        cells = "".join(f"{v.confusion[(t, p)]:9d}" for p in predicted)
        lines.append(f"{t:24s}{cells}{v.sensitivity(t):7.3f}{v.ppv(t):7.3f}")
    return "\n".join(lines)


def format_failure(truth, res) -> str:
    """One misclassified strip with the simulator's labels beside the classifier's reasons."""
    return "\n".join([
        f"simulated {truth.pattern} (ratio {truth.ratio}, artefacts {truth.artefacts}) -> "
        f"classified {res.pattern}",
        f"  why: {res.sentence}",
        f"  reasons: {', '.join(res.reasons)}",
        f"  P: {[round(float(x)) for x in truth.p_ms]}",
        f"  P kind: {list(truth.p_kind)}",
        f"  QRS: {[round(float(x)) for x in truth.qrs_ms]}",
        f"  QRS kind: {list(truth.qrs_kind)}",
        f"  fates: {[(w.index, w.fate, None if w.pr_ms is None else round(w.pr_ms)) for w in res.p_waves]}",
    ])


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, default=200, help="strips per pattern, seed and artefact setting")
    parser.add_argument("--seeds", type=int, nargs="+", default=[1, 2, 3])
    parser.add_argument("--duration-ms", type=float, default=10_000.0)
    parser.add_argument("--show-failures", type=int, default=0, metavar="K",
                        help="print K misclassified strips per simulated pattern")
    args = parser.parse_args(argv)
    for label, arts in (("artefacts off", (False,)), ("artefacts on", (True,))):
        v = run_validation(args.n, tuple(args.seeds), arts, args.duration_ms)
        print(f"\n== {label}: {args.n} strips x {len(PATTERNS)} patterns x seeds {args.seeds}, "
              f"{args.duration_ms / 1000:.0f} s strips")
        print(format_confusion(v))
        print(f"worst sensitivity/PPV: {v.worst():.3f} (target {TARGET})")
        shown = Counter()
        for truth, res in v.failures:
            if shown[truth.pattern] < args.show_failures:
                shown[truth.pattern] += 1
                print(format_failure(truth, res))
    return 0


if __name__ == "__main__":
    sys.exit(main())
