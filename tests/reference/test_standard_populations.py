"""Built-in standard populations against their publications (values and sums)."""

from __future__ import annotations

import pytest

from cohort.stats.standardize import load_standard_population

# Ahmad OB et al. (2001) Age standardization of rates: a new WHO standard, GPE Discussion
# Paper 31, WHO: percent by 5-year band, 0-4 ... 95-99, 100+ (as tabulated by US SEER; level P
# in the project's reference notes).
WHO_PERCENT = [8.86, 8.69, 8.60, 8.47, 8.22, 7.93, 7.61, 7.15, 6.59, 6.04, 5.37, 4.55, 3.72,
               2.96, 2.21, 1.52, 0.91, 0.44, 0.15, 0.04, 0.005]
# SEER's per-million rendering of the same standard (SEER, as quoted in the reference notes).
WHO_SEER_PER_MILLION = [88569, 86870, 85970, 84670, 82171, 79272, 76073, 71475, 65877, 60379,
                        53681, 45484, 37187, 29590, 22092, 15195, 9097, 4398, 1500, 400, 50]
# Eurostat (2013) Revision of the European Standard Population, per 100,000, 0-4 ... 85-89, 90+
# (as quoted).
ESP_2013 = [5000, 5500, 5500, 5500, 6000, 6000, 6500, 7000, 7000, 7000, 7000, 6500, 6000, 5500,
            5000, 4000, 2500, 1500, 1000]
# Klein RJ & Schoenborn CA (2001) Healthy People 2010 Statistical Notes No. 20, Table 1, per
# million (as quoted): <1, 1-4, 5-14, 15-24, ..., 75-84, 85+.
US_2000 = [13818, 55317, 145565, 138646, 135573, 162613, 134834, 87247, 66037, 44842, 15508]
US_2000_BANDS = [(0, 0), (1, 4), (5, 14), (15, 24), (25, 34), (35, 44), (45, 54), (55, 64),
                 (65, 74), (75, 84), (85, None)]


def test_who_2000_2025() -> None:
    who = load_standard_population("who_2000_2025")
    assert list(who.published) == WHO_PERCENT
    assert who.bands == tuple((a, a + 4) for a in range(0, 100, 5)) + ((100, None),)
    # The printed percents sum to 100.035 (Ahmad et al. 2001); weights are renormalized.
    assert who.published_total == pytest.approx(100.035, abs=1e-9)
    assert who.weights.sum() == pytest.approx(1.0, abs=1e-12)
    # Renormalized percents agree with SEER's per-million version to within its rounding
    # (SEER rounds differently; at most ~30 per million apart).
    for ours, seer in zip(who.weights * 1e6, WHO_SEER_PER_MILLION, strict=True):
        assert ours == pytest.approx(seer, abs=40)


def test_european_2013() -> None:
    esp = load_standard_population("european_2013")
    assert list(esp.published) == ESP_2013
    assert esp.bands[-1] == (90, None) and len(esp.bands) == 19
    assert esp.published_total == 100_000


def test_us_2000() -> None:
    us = load_standard_population("us_2000")
    assert list(us.published) == US_2000
    assert list(us.bands) == US_2000_BANDS
    assert us.published_total == 1_000_000
