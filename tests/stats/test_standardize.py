"""Unit and property tests for cohort.stats.standardize (published values: tests/reference)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import polars as pl
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from cohort.errors import DataError
from cohort.stats.standardize import (
    STANDARD_POPULATIONS,
    STANDARDIZED_COLUMNS,
    StandardPopulation,
    assign_age_bands,
    band_label,
    direct_standardize,
    load_standard_population,
    map_age_bands,
    parse_age_band,
    standardize_by_age,
    standardized_table,
)

# --------------------------------------------------------------------------- standards


@pytest.mark.parametrize("name", STANDARD_POPULATIONS)
def test_standards_load_as_contiguous_bands_from_zero(name: str) -> None:
    std = load_standard_population(name)
    assert std.bands[0][0] == 0 and std.bands[-1][1] is None
    for (_, up), (lo, _) in zip(std.bands[:-1], std.bands[1:], strict=True):
        assert lo == up + 1
    assert std.weights.sum() == pytest.approx(1.0, abs=1e-12)
    frame = std.to_frame()
    assert list(frame.columns) == ["age_lower", "age_upper", "label", "published", "weight"]


def test_who_weights_are_renormalized() -> None:
    # The printed WHO percents sum to 100.035 (Ahmad et al. 2001, as tabulated by SEER);
    # the loader must divide by that sum, not by 100.
    who = load_standard_population("who_2000_2025")
    assert who.published_total == pytest.approx(100.035, abs=1e-9)
    assert who.weights[0] == pytest.approx(8.86 / 100.035, rel=1e-12)
    assert who.weights[0] != pytest.approx(0.0886, rel=1e-5)
    assert who.weights.sum() == pytest.approx(1.0, abs=1e-12)


def test_unknown_standard_lists_choices() -> None:
    with pytest.raises(DataError, match="who_2000_2025"):
        load_standard_population("world")


def test_custom_standard_is_checked() -> None:
    with pytest.raises(DataError, match="gap"):
        StandardPopulation.from_weights("x", ["0-4", "10+"], [1, 1])
    with pytest.raises(DataError, match="weights"):
        StandardPopulation.from_weights("x", ["0-4", "5+"], [1, -1])


# --------------------------------------------------------------------------- bands


@pytest.mark.parametrize(
    ("label", "band"),
    [
        ("20-24", (20, 24)),
        (" 20 - 24 ", (20, 24)),
        ("85+", (85, None)),
        ("40 and over", (40, None)),
        ("Under 20", (0, 19)),
        ("<1", (0, 0)),
        ("7", (7, 7)),
        ((5, 9), (5, 9)),
        ((90, None), (90, None)),
    ],
)
def test_parse_age_band(label: str | tuple, band: tuple) -> None:
    assert parse_age_band(label) == band


@pytest.mark.parametrize("label", ["adults", "9-5", "20 to", "-3"])
def test_parse_age_band_rejects_nonsense(label: str) -> None:
    with pytest.raises(DataError):
        parse_age_band(label)


def test_band_label_round_trips() -> None:
    for band in [(0, 4), (85, None), (7, 7)]:
        assert parse_age_band(band_label(band)) == band


def test_assign_age_bands() -> None:
    who = load_standard_population("who_2000_2025")
    idx = assign_age_bands([0, 4.99, 5, 99.5, 100, 130], who.bands)
    assert idx.tolist() == [0, 0, 1, 19, 20, 20]
    # Bands given out of order: the index still points into the list as given.
    assert assign_age_bands([3, 12], ["10-19", "0-9"]).tolist() == [1, 0]
    with pytest.raises(DataError, match="2 of 3 ages are missing or outside the bands 0-9"):
        assign_age_bands([3, -1, np.nan], ["0-4", "5-9"])


def test_map_coarser_data_bands_sums_standard_weights() -> None:
    who = load_standard_population("who_2000_2025")
    bands = [f"{a}-{a + 9}" for a in range(0, 90, 10)] + ["90+"]
    m = map_age_bands(bands, who)
    assert m.bands == tuple(parse_age_band(b) for b in bands)
    expected = [who.weights[2 * i] + who.weights[2 * i + 1] for i in range(9)]
    expected.append(who.weights[18:].sum())
    assert m.weights == pytest.approx(expected)
    assert m.coverage == pytest.approx(1.0)


def test_map_finer_data_bands_collapses_them() -> None:
    m = map_age_bands([str(a) for a in range(40, 90)], "european_2013")
    assert m.bands[0] == (40, 44) and m.bands[-1] == (85, 89)
    assert m.data_index[:6] == (0, 0, 0, 0, 0, 1)
    # Ages 40-89 hold 52,000 of the 100,000 (Eurostat 2013 weights).
    assert m.coverage == pytest.approx(0.52)
    assert sum(m.weights) == pytest.approx(1.0)


def test_map_mixed_nesting() -> None:
    m = map_age_bands(["0-19", "20-22", "23-24", "25-29", "30+"], "who_2000_2025")
    assert m.bands == ((0, 19), (20, 24), (25, 29), (30, None))
    assert m.data_index == (0, 1, 1, 2, 3)


@pytest.mark.parametrize(
    ("bands", "message"),
    [
        (["0-6", "7-9", "10+"], "2 of 3 data age bands do not nest"),
        (["3-9", "10+"], "starts at 3"),
        (["0-4", "10-14"], "gap"),
        (["0-4", "3-9"], "overlap"),
        (["0-4", "0-4"], "listed twice"),
    ],
)
def test_map_rejects_bands_that_do_not_nest(bands: list[str], message: str) -> None:
    with pytest.raises(DataError, match=message):
        map_age_bands(bands, "who_2000_2025")


def test_map_rejects_data_beyond_the_standard() -> None:
    short = StandardPopulation.from_weights("short", ["0-39", "40-84"], [3, 1])
    with pytest.raises(DataError, match="beyond standard 'short'"):
        map_age_bands(["40-84", "85+"], short)


# --------------------------------------------------------------------------- arithmetic


def test_own_population_as_standard_gives_the_crude_rate() -> None:
    # Standardizing to the study's own age structure reproduces the crude rate
    # (common practice, no source).
    x, n = np.array([3, 10, 40]), np.array([1000.0, 2000.0, 1500.0])
    res = direct_standardize(x, n, n, per=1000.0)
    assert res.estimate == pytest.approx(res.crude)
    assert res.crude == pytest.approx(53 / 4.5)


def test_weights_in_any_unit_give_the_same_rate() -> None:
    x, n = [3, 10, 40], [1000.0, 2000.0, 1500.0]
    a = direct_standardize(x, n, [20.0, 50.0, 30.0])
    b = direct_standardize(x, n, [0.2, 0.5, 0.3])
    assert (a.estimate, a.lower, a.upper) == pytest.approx((b.estimate, b.lower, b.upper))


def test_zero_events_upper_limit_is_the_one_stratum_gamma() -> None:
    # With y = v = 0 the Fay-Feuer upper limit is Gamma(shape 1, scale w_M), whose 1 - a/2
    # quantile is -w_M log(a/2) (Fay & Feuer 1997, formula as in tests/reference notes).
    x, n, s = [0, 0], [100.0, 400.0], [0.5, 0.5]
    res = direct_standardize(x, n, s)
    assert res.estimate == 0.0 and res.lower == 0.0
    assert res.upper == pytest.approx(-(0.5 / 100.0) * np.log(0.025))


def test_zero_population_needs_zero_weight() -> None:
    with pytest.raises(DataError, match="1 of 2 strata have a missing, negative or zero"):
        direct_standardize([1, 0], [100.0, 0.0], [0.5, 0.5])
    res = direct_standardize([1, 0], [100.0, 0.0], [1.0, 0.0])
    assert res.estimate == pytest.approx(0.01)


def test_tiwari_is_less_conservative_above_only() -> None:
    x, n, s = [2, 15, 60], [500.0, 3000.0, 9000.0], [0.5, 0.3, 0.2]
    ff = direct_standardize(x, n, s, method="fay_feuer")
    tw = direct_standardize(x, n, s, method="tiwari")
    assert tw.estimate == ff.estimate and tw.lower == ff.lower
    assert tw.estimate < tw.upper < ff.upper
    # Tiwari et al. (2006) upper limit: y + mean(w), v + mean(w^2) (as described in asht's
    # wspoissonTest, wmtype "tcz"); recomputed here with scipy.
    w = np.array(s) / np.array(n)
    y, v = np.sum(w * x), np.sum(w**2 * np.array(x))
    ys, vs = y + w.mean(), v + np.mean(w**2)
    assert tw.upper == pytest.approx(stats.gamma.ppf(0.975, ys**2 / vs, scale=vs / ys))


def test_standardize_by_age_sums_repeated_bands() -> None:
    bands = ["0-19", "20-39", "0-19", "40+"]
    a = standardize_by_age(bands, [1, 4, 2, 9], [100.0, 300.0, 50.0, 200.0], "european_2013")
    b = standardize_by_age(["0-19", "20-39", "40+"], [3, 4, 9], [150.0, 300.0, 200.0],
                           "european_2013")
    assert a == b
    assert a.standard == "european_2013" and a.coverage == pytest.approx(1.0)


@settings(max_examples=100, deadline=None)
@given(
    st.lists(
        st.tuples(st.integers(0, 300), st.floats(50.0, 1e5), st.floats(0.01, 10.0)),
        min_size=1,
        max_size=8,
    ),
    st.floats(0.001, 0.5),
    st.sampled_from(["fay_feuer", "tiwari"]),
)
def test_interval_contains_estimate_and_widens(strata: list, alpha: float, method: str) -> None:
    x, n, s = (np.array(c) for c in zip(*strata, strict=True))
    res = direct_standardize(x, n, s, alpha=alpha, method=method)
    assert 0.0 <= res.lower <= res.estimate <= res.upper
    wider = direct_standardize(x, n, s, alpha=alpha / 2, method=method)
    assert wider.lower <= res.lower + 1e-15 and wider.upper >= res.upper - 1e-15


# --------------------------------------------------------------------------- frame level


def _persons() -> pl.DataFrame:
    rng = np.random.default_rng(20240611)
    age = rng.integers(40, 90, 4000)
    sex = rng.choice(["F", "M"], age.size)
    block = rng.random(age.size) < 0.01 + 0.002 * (age - 40)
    who = load_standard_population("who_2000_2025")
    labels = [band_label(who.bands[i]) for i in assign_age_bands(age, who.bands)]
    return pl.DataFrame({"band": labels, "sex": sex, "block": block.astype(int), "one": 1})


def test_standardized_table_matches_the_pure_function() -> None:
    pf = _persons()
    out = standardized_table(pf, age_band="band", events="block", population="one", by="sex",
                             per=100.0)
    assert list(out.columns) == ["sex", *STANDARDIZED_COLUMNS]
    assert out["sex"].tolist() == ["F", "M"]
    women = pf.filter(pl.col("sex") == "F").group_by("band").agg(pl.col("block").sum(),
                                                                 pl.len()).sort("band")
    direct = standardize_by_age(women["band"].to_list(), women["block"].to_numpy(),
                                women["len"].to_numpy(), "who_2000_2025", per=100.0)
    row = out.iloc[0]
    assert (row["estimate"], row["lower"], row["upper"]) == pytest.approx(
        (direct.estimate, direct.lower, direct.upper))
    assert row["coverage"] == pytest.approx(direct.coverage)
    assert row["coverage"] < 1.0  # ages 40-89 only
    pandas_out = standardized_table(pf.to_pandas(), age_band="band", events="block",
                                    population="one", by="sex", per=100.0)
    pd.testing.assert_frame_equal(out, pandas_out)


def test_standardized_table_group_missing_a_band_raises() -> None:
    frame = pd.DataFrame({"band": ["40-44", "45-49", "40-44"], "sex": ["F", "F", "M"],
                          "cases": [1, 2, 1], "pop": [100, 100, 100]})
    with pytest.raises(DataError, match="sex='M' has no population in 1 of 2 age bands \\(45-49\\)"):
        standardized_table(frame, age_band="band", events="cases", population="pop", by="sex")


def test_standardized_table_requires_bands() -> None:
    frame = pd.DataFrame({"band": ["40-44", None], "cases": [1, 2], "pop": [100, 100]})
    with pytest.raises(DataError, match="1 of 2 rows have no 'band'"):
        standardized_table(frame, age_band="band", events="cases", population="pop")
