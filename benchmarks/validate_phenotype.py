"""Validate the conduction phenotype (ecg_conduction) against the synthetic generator's truth.

Generates a registry (or takes ``--exports``), ingests it, runs the phenotype with one rule set,
joins ``ecg_conduction`` to ``truth/ecg_truth.parquet`` on ecg_key = tracing_id and prints,
per axis (rhythm, AV, ventricular), sensitivity and PPV of each category with counts and
Wilson 95 % limits, a confusion table and the disagreement classes, in four strata:

all
    every ECG.
confirmed
    ECGs whose categories come from a confirmed (physician overread) read: the read used is
    the confirmed one.
machine_right
    ECGs where the machine's own statements on this axis agree with the truth (the
    generator's record ``machine_statements``, concept meanings in
    synthetic_registry/data/statements.toml): deliberate machine misreads, which the
    phenotype is meant to reproduce when no overread exists, are left out.
clean
    ECGs whose *inputs* are right: the fair stratum for the target. For each axis the read
    used (confirmed, else machine) must (1) state nothing on this axis that contradicts the
    truth and nothing too vague to decide it ("second degree" without type), name the
    morphology where only a statement can give it (RBBB, LBBB, their incomplete forms,
    paced, ventricular escape), and state the true rhythm; and (2) have its measurements on
    the same side of every rule threshold as the true values (PR bands; QRS > 110, >= 120,
    < 110, < 120 ms; axis in the LAFB / LPFB ranges; the atrial/ventricular rate-ratio band;
    the beat-level pattern of a strip equal to the simulated one). Measurements are waived
    where a right statement decides the category alone (AV statements other than first
    degree; paced and escape rhythms). Thresholds are read from the rule set, not repeated.
    Disagreements left in this stratum are phenotype bugs, definition mismatches or
    generator artefacts, never input errors.

Target (issue): sensitivity and PPV >= 0.99 in the clean stratum for every category with at
least ``MIN_N`` clean ECGs (truth and prediction side).

    /work/venv/bin/python benchmarks/validate_phenotype.py --persons 20000 --seed 7
    /work/venv/bin/python benchmarks/validate_phenotype.py --exports DIR --show 3
"""

from __future__ import annotations

import argparse
import sys
import tempfile
from dataclasses import dataclass
from pathlib import Path

import polars as pl

from cohort.ingest import ingest
from cohort.phenotype import list_unrecognised, load_rule_set, run_phenotype
from cohort.phenotype.rules import param_row
from cohort.registry import connect
from cohort.stats.proportions import wilson_intervals
from cohort.vocabulary import AV_CATEGORIES, RHYTHM_CLASSES, VENTRICULAR_CONDUCTION
from synthetic_registry import generate
from synthetic_registry.config import load_config

TARGET = 0.99
MIN_N = 30
AXES = {  # axis -> (truth column, phenotype column, category order)
    "rhythm": ("rhythm", "phen_rhythm", tuple(RHYTHM_CLASSES)),
    "av": ("av_category", "phen_av", tuple(AV_CATEGORIES)),
    "ventricular": ("ventricular_conduction", "phen_vc", tuple(VENTRICULAR_CONDUCTION)),
}
STRATA = ("all", "confirmed", "machine_right", "clean")
# AV categories a right statement decides alone (a first-degree statement is graded by PR).
AV_STATEMENT_DECIDES = (
    "short_pr", "marked_first_degree", "mobitz_i", "mobitz_ii", "two_to_one", "high_grade",
    "third_degree", "av_dissociation",
)
# Ventricular categories only a statement can give (measurements cannot tell morphology).
VC_NEEDS_STATEMENT = ("incomplete_rbbb", "rbbb", "incomplete_lbbb", "lbbb", "paced",
                      "not_assessable")
VC_STATEMENT_DECIDES = ("paced", "not_assessable")


# ------------------------------------------------------------------ build and join


def build_registry(exports: Path, db: Path, rules_id: str):
    """Ingest ``exports`` into a new registry at ``db`` and phenotype it; return the connection."""
    if db.exists():
        db.unlink()
    con = connect(db)
    ingest(con, [exports])
    run_phenotype(con, rules_id=rules_id)
    return con


def phenotype_frame(con, rules_id: str) -> pl.DataFrame:
    """The columns of ecg_conduction the validation needs, for one rule set."""
    return pl.from_arrow(con.sql(
        "SELECT ecg_key, read_kind, rhythm_class AS phen_rhythm, av_category AS phen_av, "
        "ventricular_conduction AS phen_vc, "
        "av_source, vc_source, rhythm_source, beat_pattern AS phen_beat_pattern, pr_ms, qrs_ms, "
        "qrs_axis, ventricular_rate, atrial_rate, evidence "
        "FROM ecg_conduction WHERE rule_set_id = ?", params=[rules_id],
    ).to_arrow_table())


def _meaning_table() -> dict[str, tuple[str, ...]]:
    lex = load_config().lexicon
    return dict(zip(lex.concepts, lex.means, strict=True))


def _meanings(col: str, table: dict[str, tuple[str, ...]]) -> pl.Expr:
    """List of meaning codes of a ';'-joined concept column (empty list when null)."""
    keys = list(table)
    values = [list(v) for v in table.values()]
    return (
        pl.col(col).fill_null("").str.split(";")
        .list.eval(pl.element().replace_strict(keys, values, default=[], return_dtype=pl.List(pl.String)))
        .list.eval(pl.element().explode().drop_nulls())
        .alias(col + "_means")
    )


def joined_frame(con, exports: Path, rules_id: str) -> pl.DataFrame:
    """ecg_conduction joined to ecg_truth, with the stratum flags of every axis."""
    truth = pl.read_parquet(Path(exports) / "truth" / "ecg_truth.parquet")
    phen = phenotype_frame(con, rules_id)
    table = _meaning_table()
    frame = truth.join(phen, left_on="tracing_id", right_on="ecg_key", how="inner")
    frame = frame.with_columns(
        _meanings("machine_statements", table),
        _meanings("confirmed_statements", table),
    ).with_columns(
        pl.when(pl.col("read_kind") == "confirmed")
        .then(pl.col("confirmed_statements_means"))
        .otherwise(pl.col("machine_statements_means"))
        .alias("used_means")
    )
    return add_strata(frame, param_row(load_rule_set(rules_id)))


# ------------------------------------------------------------------ statement checks


def _axis_codes(means: str, prefix: str) -> pl.Expr:
    return (
        pl.col(means).list.eval(pl.element().filter(pl.element().str.starts_with(prefix)))
        .list.eval(pl.element().str.strip_prefix(prefix)).list.unique().list.sort()
    )


def _has(means: str, code: str) -> pl.Expr:
    return pl.col(means).list.contains(code)


def _denied(means: str, axis: str) -> pl.Expr:
    """Categories of ``axis`` a comparison statement says are no longer present."""
    return _axis_codes(means, f"not:{axis}:")


def rhythm_statement_right(means: str) -> pl.Expr:
    """Exactly one rhythm class is stated, it is the true one, and it is not denied."""
    codes = _axis_codes(means, "rhythm:")
    truth = pl.col("rhythm")
    return (
        (codes.list.len() == 1) & (codes.list.first() == truth)
        & ~_denied(means, "rhythm").list.contains(truth)
    )


def av_statement_right(means: str) -> pl.Expr:
    """The AV statements name the true category, or none is made where PR can decide it.

    With no AV finding stated, "normal ECG" or "first-degree block no longer present" is read
    by the rule set as normal AV conduction: right only when the truth is short or normal PR.
    """
    codes = _axis_codes(means, "av:")
    truth = pl.col("av_category")
    one = codes.list.len() == 1
    named = one & (codes.list.first() == truth)
    # "First degree" stated on a PR >= 300 ms: the rule set grades it by PR (marked).
    graded = one & (codes.list.first() == "first_degree") & (truth == "marked_first_degree")
    measurable = truth.is_in(["short_pr", "normal_pr", "first_degree", "marked_first_degree",
                              "not_assessable"])
    normal_claim = _has(means, "global:normal") | (_denied(means, "av").list.len() > 0)
    silent = (codes.list.len() == 0) & measurable & (
        ~normal_claim | truth.is_in(["short_pr", "normal_pr", "not_assessable"])
    )
    return named | graded | silent


def av_statement_decides(means: str) -> pl.Expr:
    codes = _axis_codes(means, "av:")
    return (codes.list.len() == 1) & codes.list.first().is_in(AV_STATEMENT_DECIDES)


def vc_statement_right(means: str) -> pl.Expr:
    """The ventricular statements fit the true category (see the module docstring).

    With no ventricular finding stated, "normal ECG" or "RBBB no longer present" is read by the
    rule set as normal conduction: right only when the truth is normal.
    """
    codes = _axis_codes(means, "vc:")
    n = codes.list.len()
    truth = pl.col("ventricular_conduction")
    lad, rad = _has(means, "ctx:left_axis_deviation"), _has(means, "ctx:right_axis_deviation")
    normal_claim = _has(means, "global:normal") | (_denied(means, "vc").list.len() > 0)
    only = (n == 1) & (codes.list.first() == truth)
    silent = n == 0
    measured = silent & ~normal_claim  # the measurements decide
    bif_parts = codes.list.contains("rbbb") & (
        codes.list.contains("lafb") | codes.list.contains("lpfb")
    )
    rbbb_only = (n == 1) & (codes.list.first() == "rbbb") & ~lad & ~rad
    return (
        pl.when(truth == "normal").then(silent)
        .when(truth == "nonspecific_ivcd").then(measured | only)
        .when(truth == "lafb").then((measured | only) & ~lad)
        .when(truth == "lpfb").then((measured | only) & ~rad)
        .when(truth == "bifascicular").then(
            codes.list.contains("bifascicular") | ((n == 2) & bif_parts) | rbbb_only
        )
        .when(truth.is_in(VC_NEEDS_STATEMENT)).then(only)
        .otherwise(pl.lit(False))
    )


# ------------------------------------------------------------------ measurement checks


def _pr_band(col: str, p: dict) -> pl.Expr:
    x = pl.col(col)
    first = (x >= p["first_degree_ms"]) if p["first_degree_inclusive"] else (x > p["first_degree_ms"])
    marked = (
        (x >= p["marked_first_degree_ms"]) if p["marked_first_degree_inclusive"]
        else (x > p["marked_first_degree_ms"])
    )
    return (
        pl.when(x.is_null()).then(pl.lit("none"))
        .when(x < p["short_below_ms"]).then(pl.lit("short"))
        .when(marked).then(pl.lit("marked"))
        .when(first).then(pl.lit("first"))
        .otherwise(pl.lit("normal"))
    )


def _qrs_band(col: str, p: dict) -> pl.Expr:
    x = pl.col(col)
    return pl.concat_str(
        [
            (x > p["ivcd_above_ms"]).cast(pl.String), (x >= p["complete_bbb_min_ms"]).cast(pl.String),
            (x < p["incomplete_bbb_min_ms"]).cast(pl.String),
            (x < p["fascicular_below_ms"]).cast(pl.String),
        ],
        separator="/", ignore_nulls=False,
    ).fill_null("none")


def _axis_band(col: str, p: dict) -> pl.Expr:
    a = 180.0 - ((180.0 - pl.col(col)) % 360.0)  # folded into (-180, 180] as the SQL does
    return (
        pl.when(a.is_null()).then(pl.lit("none"))
        .when(a.is_between(p["lafb_min_deg"], p["lafb_max_deg"])).then(pl.lit("lafb"))
        .when(a.is_between(p["lpfb_min_deg"], p["lpfb_max_deg"])).then(pl.lit("lpfb"))
        .otherwise(pl.lit("other"))
    )


def _rate_band(atrial: str, vent: str, p: dict) -> pl.Expr:
    ratio = pl.col(atrial) / pl.col(vent)
    slow = (pl.col(vent) > 0) & (pl.col(vent) < p["rd_max_ventricular_rate"])
    return (
        pl.when(pl.col(atrial).is_null() | ~slow | (ratio < p["rd_two_to_one_min"]))
        .then(pl.lit("none"))
        .when(ratio <= p["rd_two_to_one_max"]).then(pl.lit("2to1"))
        .otherwise(pl.lit("high"))
    )


def add_strata(frame: pl.DataFrame, p: dict) -> pl.DataFrame:
    """Boolean columns ``<stratum>_<axis>`` and the first failed input ``why_<axis>``."""
    na_rhythm = pl.col("rhythm").is_in(p["pr_not_assessable"])
    f = frame.with_columns(
        (_pr_band("pr_ms", p) == _pr_band("true_pr_ms", p)).alias("pr_ok"),
        (_qrs_band("qrs_ms", p) == _qrs_band("true_qrs_ms", p)).alias("qrs_ok"),
        (_axis_band("qrs_axis", p) == _axis_band("true_qrs_axis", p)).alias("axis_ok"),
        (na_rhythm | (_rate_band("atrial_rate", "ventricular_rate", p)
                      == _rate_band("true_atrial_rate", "true_vent_rate", p))).alias("rate_ok"),
        (pl.col("beat_pattern").is_null()
         | (pl.col("phen_beat_pattern") == pl.col("beat_pattern")).fill_null(False)).alias("beat_ok"),
        rhythm_statement_right("used_means").alias("rhythm_stmt_ok"),
        av_statement_right("used_means").alias("av_stmt_ok"),
        vc_statement_right("used_means").alias("vc_stmt_ok"),
        av_statement_decides("used_means").alias("av_decides"),
        pl.col("ventricular_conduction").is_in(VC_STATEMENT_DECIDES).alias("vc_decides"),
        rhythm_statement_right("machine_statements_means").alias("machine_right_rhythm"),
        (rhythm_statement_right("machine_statements_means")
         & av_statement_right("machine_statements_means")).alias("machine_right_av"),
        (rhythm_statement_right("machine_statements_means")
         & vc_statement_right("machine_statements_means")).alias("machine_right_ventricular"),
    )
    av_meas = pl.col("pr_ok") & pl.col("rate_ok") & pl.col("beat_ok")
    vc_meas = pl.col("qrs_ok") & pl.col("axis_ok")
    f = f.with_columns(
        pl.col("rhythm_stmt_ok").alias("clean_rhythm"),
        (pl.col("rhythm_stmt_ok") & pl.col("av_stmt_ok") & (pl.col("av_decides") | av_meas))
        .alias("clean_av"),
        (pl.col("rhythm_stmt_ok") & pl.col("vc_stmt_ok") & (pl.col("vc_decides") | vc_meas))
        .alias("clean_ventricular"),
        _why([("rhythm_statement", "rhythm_stmt_ok")]).alias("why_rhythm"),
        _why([("rhythm_statement", "rhythm_stmt_ok"), ("av_statement", "av_stmt_ok"),
              ("pr_band", "pr_ok"), ("rate_band", "rate_ok"), ("beat_pattern", "beat_ok")],
             waive="av_decides").alias("why_av"),
        _why([("rhythm_statement", "rhythm_stmt_ok"), ("vc_statement", "vc_stmt_ok"),
              ("qrs_band", "qrs_ok"), ("axis_band", "axis_ok")],
             waive="vc_decides").alias("why_ventricular"),
    )
    for axis in AXES:
        f = f.with_columns(
            pl.lit(True).alias(f"all_{axis}"),
            (pl.col("read_kind") == "confirmed").alias(f"confirmed_{axis}"),
        )
    return f


def _why(checks: list[tuple[str, str]], waive: str | None = None) -> pl.Expr:
    """Name of the first failed input check ('inputs_right' when none failed)."""
    expr = pl.when(pl.lit(False)).then(pl.lit(""))
    for i, (label, col) in enumerate(checks):
        cond = ~pl.col(col)
        if waive is not None and i >= 2:  # statements always count; measurements can be waived
            cond = cond & ~pl.col(waive)
        expr = expr.when(cond).then(pl.lit(label))
    return expr.otherwise(pl.lit("inputs_right"))


# ------------------------------------------------------------------ metrics


@dataclass(frozen=True)
class CategoryMetrics:
    """Sensitivity and PPV of one category in one stratum, with Wilson 95 % limits."""

    axis: str
    stratum: str
    category: str
    n_true: int
    n_pred: int
    tp: int
    sensitivity: float
    sens_lower: float
    sens_upper: float
    ppv: float
    ppv_lower: float
    ppv_upper: float

    @property
    def assessed(self) -> bool:
        """Counts large enough to hold the category to the target."""
        return self.n_true >= MIN_N and self.n_pred >= MIN_N

    @property
    def meets_target(self) -> bool:
        return self.sensitivity >= TARGET and self.ppv >= TARGET


def category_metrics(frame: pl.DataFrame, axis: str, stratum: str) -> list[CategoryMetrics]:
    """Per-category counts and proportions for one axis and stratum."""
    truth_col, pred_col, order = AXES[axis]
    sub = frame.filter(pl.col(f"{stratum}_{axis}"))
    t, p = sub[truth_col], sub[pred_col]
    cats = [c for c in order if (t == c).any() or (p == c).any()]
    n_true = [int((t == c).sum()) for c in cats]
    n_pred = [int((p == c).sum()) for c in cats]
    tp = [int(((t == c) & (p == c)).sum()) for c in cats]
    sens = wilson_intervals(tp, n_true)
    ppv = wilson_intervals(tp, n_pred)
    return [
        CategoryMetrics(axis, stratum, c, n_true[i], n_pred[i], tp[i],
                        float(sens.estimate[i]), float(sens.lower[i]), float(sens.upper[i]),
                        float(ppv.estimate[i]), float(ppv.lower[i]), float(ppv.upper[i]))
        for i, c in enumerate(cats)
    ]


def all_metrics(frame: pl.DataFrame) -> list[CategoryMetrics]:
    return [m for axis in AXES for s in STRATA for m in category_metrics(frame, axis, s)]


def target_failures(metrics: list[CategoryMetrics], stratum: str = "clean") -> list[CategoryMetrics]:
    """Categories of the stratum with enough ECGs that miss the target."""
    return [m for m in metrics if m.stratum == stratum and m.assessed and not m.meets_target]


def confusion(frame: pl.DataFrame, axis: str, stratum: str) -> pl.DataFrame:
    """Truth (rows) by phenotype (columns) counts in one stratum."""
    truth_col, pred_col, order = AXES[axis]
    sub = frame.filter(pl.col(f"{stratum}_{axis}"))
    counts = sub.group_by(truth_col, pred_col).len()
    cols = [c for c in order if c in set(counts[pred_col])]
    wide = counts.pivot(on=pred_col, index=truth_col, values="len").fill_null(0)
    rank = {c: i for i, c in enumerate(order)}
    wide = wide.with_columns(pl.col(truth_col).replace_strict(rank).alias("_r")).sort("_r").drop("_r")
    return wide.select(truth_col, *[c for c in cols if c in wide.columns])


def disagreement_classes(frame: pl.DataFrame, axis: str, min_count: int = 1) -> pl.DataFrame:
    """Disagreements grouped by truth, phenotype, read used, source and first failed input."""
    truth_col, pred_col, _ = AXES[axis]
    source = {"rhythm": "rhythm_source", "av": "av_source", "ventricular": "vc_source"}[axis]
    return (
        frame.filter(pl.col(truth_col) != pl.col(pred_col))
        .group_by(pl.col(truth_col).alias("truth"), pl.col(pred_col).alias("phenotype"),
                  "read_kind", pl.col(source).alias("source"),
                  pl.col(f"why_{axis}").alias("first_wrong_input"))
        .len("n").filter(pl.col("n") >= min_count).sort("n", descending=True)
    )


# ------------------------------------------------------------------ printing


def format_metrics(metrics: list[CategoryMetrics], axis: str, stratum: str) -> str:
    rows = [m for m in metrics if m.axis == axis and m.stratum == stratum]
    lines = [f"{'category':22s}{'n_true':>8s}{'n_pred':>8s}{'TP':>8s}"
             f"{'sens':>8s}{'(95% CI)':>16s}{'PPV':>8s}{'(95% CI)':>16s}  target"]
    for m in rows:
        flag = "" if not m.assessed else ("ok" if m.meets_target else "MISS")
        lines.append(
            f"{m.category:22s}{m.n_true:8d}{m.n_pred:8d}{m.tp:8d}"
            f"{m.sensitivity:8.4f}{_ci(m.sens_lower, m.sens_upper):>16s}"
            f"{m.ppv:8.4f}{_ci(m.ppv_lower, m.ppv_upper):>16s}  {flag}"
        )
    return "\n".join(lines)


def _ci(lo: float, hi: float) -> str:
    return "" if lo != lo else f"({lo:.3f}-{hi:.3f})"


def summary_line(frame: pl.DataFrame, axis: str, stratum: str) -> str:
    truth_col, pred_col, _ = AXES[axis]
    sub = frame.filter(pl.col(f"{stratum}_{axis}"))
    agree = int((sub[truth_col] == sub[pred_col]).sum())
    share = agree / sub.height if sub.height else float("nan")
    return f"{axis} / {stratum}: {sub.height} ECGs, agreement {agree} ({share:.4f})"


def examples(frame: pl.DataFrame, axis: str, k: int) -> pl.DataFrame:
    """Up to k ECGs per disagreement class, with the inputs that decide it."""
    truth_col, pred_col, _ = AXES[axis]
    cols = ["tracing_id", truth_col, pred_col, "read_kind", "machine_statements",
            "confirmed_statements", "true_pr_ms", "pr_ms", "true_qrs_ms", "qrs_ms",
            "true_qrs_axis", "qrs_axis", "beat_pattern", "phen_beat_pattern", f"why_{axis}",
            "evidence"]
    cols = list(dict.fromkeys(cols))
    return (
        frame.filter(pl.col(truth_col) != pl.col(pred_col))
        .with_columns(pl.int_range(pl.len()).over(truth_col, pred_col).alias("_k"))
        .filter(pl.col("_k") < k).select(cols)
    )


@dataclass(frozen=True)
class Validation:
    """The joined frame, its metrics and the statements the lexicon could not read."""

    frame: pl.DataFrame
    metrics: list[CategoryMetrics]
    unrecognised: list[dict]
    n_truth: int  # tracings in ecg_truth (frame.height smaller: ECGs missing from the registry)

    def failures(self) -> list[CategoryMetrics]:
        return target_failures(self.metrics)

    def clean_share(self, axis: str) -> float:
        """Share of ECGs in the clean stratum of ``axis``."""
        return float(self.frame[f"clean_{axis}"].mean())


def report(v: Validation, show: int = 0) -> None:
    """Print every table."""
    frame, metrics = v.frame, v.metrics
    with pl.Config(tbl_rows=200, tbl_cols=30, tbl_width_chars=250, fmt_str_lengths=120):
        for axis in AXES:
            print(f"\n######## {axis}")
            for stratum in STRATA:
                print(f"\n== {summary_line(frame, axis, stratum)}")
                print(format_metrics(metrics, axis, stratum))
            for stratum in STRATA:
                print(f"\n-- confusion ({stratum}), rows truth, columns phenotype")
                print(confusion(frame, axis, stratum))
            print("\n-- disagreement classes (all ECGs), first input that was wrong")
            print(disagreement_classes(frame, axis))
            if show:
                print(examples(frame, axis, show))
    print(f"\nstatements the lexicon could not fully read: {len(v.unrecognised)}")
    for row in v.unrecognised[:20]:
        print(f"  {row['n']:6d}  {row['statement']!r} (left over: {row['unrecognised_part']!r})")
    fails = v.failures()
    print(f"\nclean-stratum categories with >= {MIN_N} ECGs below {TARGET}: "
          + (", ".join(f"{m.axis}:{m.category} (sens {m.sensitivity:.4f}, PPV {m.ppv:.4f})"
                       for m in fails) or "none"))


def run(exports: Path | None, persons: int, seed: int, rules_id: str, workdir: Path) -> Validation:
    """Generate (unless ``exports``), ingest, phenotype, join and score."""
    if exports is None:
        exports = workdir / "export"
        generate(exports, persons=persons, seed=seed, fmt="csv")
    con = build_registry(Path(exports), workdir / "registry.duckdb", rules_id)
    try:
        frame = joined_frame(con, Path(exports), rules_id)
        unrecognised = list_unrecognised(con, rules_id)
    finally:
        con.close()
    n_truth = pl.scan_parquet(Path(exports) / "truth" / "ecg_truth.parquet").select(pl.len()).collect().item()
    return Validation(frame, all_metrics(frame), unrecognised, n_truth)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--exports", type=Path, help="an existing synthetic export (with truth/)")
    parser.add_argument("--persons", type=int, default=20_000)
    parser.add_argument("--seed", type=int, default=7)
    parser.add_argument("--rules", default="default-v1")
    parser.add_argument("--workdir", type=Path, help="where to keep the export and registry")
    parser.add_argument("--show", type=int, default=0, metavar="K",
                        help="print K example ECGs per disagreement class")
    args = parser.parse_args(argv)
    with tempfile.TemporaryDirectory(prefix="validate_phenotype_") as tmp:
        workdir = args.workdir or Path(tmp)
        workdir.mkdir(parents=True, exist_ok=True)
        v = run(args.exports, args.persons, args.seed, args.rules, workdir)
        source = f"exports {args.exports}" if args.exports else (
            f"{args.persons} persons, seed {args.seed}")
        print(f"{v.frame.height} ECGs phenotyped of {v.n_truth} true tracings; rule set "
              f"{args.rules}; {source}")
        report(v, args.show)
    return 1 if v.failures() else 0


if __name__ == "__main__":
    sys.exit(main())
