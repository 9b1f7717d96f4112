"""True measurements agree with the true category; statement concepts record what reads say.

Checks against the AHA/ACCF/HRS recommendations, Part III (Surawicz B et al., Circulation
2009;119:e235-e240, as quoted in shared/references.md): complete RBBB/LBBB QRS >= 120 ms,
incomplete 110-119 ms, nonspecific IVCD QRS > 110 ms, LAFB axis -45 to -90 and LPFB +90 to
+180 degrees with QRS < 120 ms, normal adult axis -30 to +90 degrees. Truncated-normal draws
are checked against scipy.stats.truncnorm as a reference library.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import polars as pl
import pytest
from scipy import stats

from cohort.vocabulary import AV_CATEGORIES, RHYTHM_CLASSES, VENTRICULAR_CONDUCTION
from synthetic_registry.config import load_config
from synthetic_registry.sampling import truncated_normal


@pytest.fixture(scope="module")
def truth(clean_export: Path) -> pl.DataFrame:
    return pl.read_parquet(clean_export / "truth" / "ecg_truth.parquet")


# Category -> (QRS condition, axis condition) from Surawicz 2009; None = no criterion.
CRITERIA = {
    "normal": (lambda q: q <= 110, lambda a: (a > -45) & (a < 90)),
    "incomplete_rbbb": (lambda q: (q >= 110) & (q < 120), None),
    "incomplete_lbbb": (lambda q: (q >= 110) & (q < 120), None),
    "rbbb": (lambda q: q >= 120, None),
    "lbbb": (lambda q: q >= 120, None),
    "bifascicular": (lambda q: q >= 120, lambda a: (a <= -45) | (a >= 90)),
    "lafb": (lambda q: q < 120, lambda a: (a >= -90) & (a <= -45)),
    "lpfb": (lambda q: q < 120, lambda a: (a >= 90) & (a <= 180)),
    "nonspecific_ivcd": (lambda q: q > 110, None),
}


@pytest.mark.parametrize("category", list(CRITERIA))
def test_true_qrs_and_axis_meet_the_criteria_of_the_true_category(truth, category):
    sub = truth.filter(pl.col("ventricular_conduction") == category)
    assert sub.height > 0, category
    qrs_ok, axis_ok = CRITERIA[category]
    assert qrs_ok(sub["true_qrs_ms"]).all(), category
    if axis_ok is not None:
        assert axis_ok(sub["true_qrs_axis"]).all(), category


@pytest.mark.parametrize("column", ["true_qrs_ms", "true_qrs_axis"])
def test_no_atom_of_true_values_at_a_limit(truth, column):
    # Continuous draws never repeat; clipping piled 6-7 % of true-normal tracings onto one
    # value (QRS 108 ms, axis +89 degrees), 1-2 units from the IVCD and LPFB thresholds.
    for category in CRITERIA:
        sub = truth.filter(pl.col("ventricular_conduction") == category)[column]
        top = sub.value_counts(sort=True)["count"][0]
        assert top <= 2, f"{category}: {top} tracings share one {column}"


def test_normal_axis_does_not_crowd_the_lpfb_limit(truth):
    # With a person's axis truncated at +89 (not clipped), few normal tracings lie within
    # 4 degrees of +90: the truncated normal's own tail, not a tenth of the population.
    axis = truth.filter(pl.col("ventricular_conduction") == "normal")["true_qrs_axis"]
    assert (axis >= 85).mean() < 0.04
    assert (axis >= 88.9).mean() < 0.005


@pytest.mark.parametrize(
    ("mean", "sd", "lo", "hi"), [(96.0, 9.5, 68.0, 108.0), (48.0, 30.0, -44.0, 89.0),
                                 (120.0, 4.0, -44.0, 89.0), (-80.0, 5.0, -44.0, 89.0)]
)
def test_truncated_normal_matches_scipy(mean, sd, lo, hi):
    # Reference: scipy.stats.truncnorm (standardized bounds); one-sample KS test and mean.
    rng = np.random.default_rng(20240611)
    x = truncated_normal(rng, mean, sd, lo, hi, 20_000)
    ref = stats.truncnorm((lo - mean) / sd, (hi - mean) / sd, loc=mean, scale=sd)
    assert lo <= x.min() and x.max() <= hi
    assert stats.kstest(x, ref.cdf).pvalue > 0.001
    assert abs(x.mean() - ref.mean()) < 4 * ref.std() / np.sqrt(x.size)


def test_every_statement_concept_has_valid_meanings():
    lex = load_config().lexicon
    allowed = (
        {f"rhythm:{c}" for c in RHYTHM_CLASSES} | {f"av:{c}" for c in AV_CATEGORIES}
        | {f"vc:{c}" for c in VENTRICULAR_CONDUCTION}
        | {"av:second_degree", "ctx:blocked_pac", "ctx:left_axis_deviation",
           "ctx:right_axis_deviation", "global:normal"}
    )
    allowed |= {f"not:{c}" for c in allowed}
    bad = {c: m for c, m in zip(lex.concepts, lex.means, strict=True) if set(m) - allowed}
    assert not bad
    means = dict(zip(lex.concepts, lex.means, strict=True))
    # Spot checks of the meaning table (facts of the trade, common practice, no source).
    assert means["sinus_first_degree"] == ("rhythm:sinus", "av:first_degree")
    assert means["rbbb_lafb"] == ("vc:rbbb", "vc:lafb")
    assert means["borderline_first_degree"] == ()  # borderline wording asserts nothing


def test_truth_records_the_concepts_of_each_read(truth, clean_export):
    # machine_av_statement is the AV slot of machine_statements; confirmed_statements exist
    # exactly for tracings with an overread.
    has = truth.filter(pl.col("machine_av_statement").is_not_null())
    listed = has["machine_statements"].str.split(";")
    assert all(a in b for a, b in zip(has["machine_av_statement"], listed, strict=True))
    assert (truth["confirmed_statements"].is_not_null() == truth["has_confirmed"]).all()
    assert truth["machine_statements"].null_count() == 0


def test_machine_states_right_axis_deviation_from_plus_90(clean_export, truth):
    # LPFB axis +90 to +180 (Surawicz 2009): an unexplained axis of exactly +90 gets the same
    # axis statement as +91, so no machine read leaves it without one.
    ecgs = pl.read_csv(clean_export / "ecgs.csv", infer_schema_length=0).filter(
        pl.col("read_kind") == "machine"
    ).with_columns(pl.col("qrs_axis").cast(pl.Float64))
    vc = truth.select("tracing_id", "ventricular_conduction", "rhythm")
    at_90 = ecgs.join(vc, on="tracing_id").filter(
        (pl.col("qrs_axis") == 90) & (pl.col("ventricular_conduction") == "normal")
        & (pl.col("rhythm") != "paced")
    )
    assert at_90.height > 0
    assert at_90["statements"].str.to_lowercase().str.contains("right axis deviation").all()
