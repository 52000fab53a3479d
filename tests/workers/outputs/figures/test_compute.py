"""What the figures show, computed without matplotlib (figures/compute.py): colour limits,
histogram bars and curves, tile values, worst tiles, strata rows and their intervals (median
and NMAD), re-check verdicts, the tile statistics a spec asks for. Checked against numpy."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from demaudit.workers.outputs.figures import compute
from demaudit.workers.stats import summary as dhs
from demaudit.workers.stats.robust import confidence_intervals
from tests.support.figures import heavy_tailed, numpy_limits, tiles


def test_colour_limits_equal_numpy_robust_limits_on_heavy_tailed_data():
    x = heavy_tailed()
    s = dhs.summarise(x)
    limits = compute.limits_of_summary(s)
    assert limits is not None
    low, high = numpy_limits(x)
    bounds = dhs.statistic_bounds(s)
    # the histogram's quantiles are within their stated bounds of numpy's (workers/stats/summary.py)
    tol = bounds["median"] + 3 * bounds["nmad"]
    assert abs(limits.low - low) <= tol and abs(limits.high - high) <= tol
    # a heavy tail does not stretch them: far inside min/max and mean +- 3 std
    assert limits.high < x.mean() + 3 * x.std() and limits.high - limits.low < 5.0


def test_colour_limits_keep_a_minimum_width():
    limits = compute.robust_limits(1.0, 0.0)
    assert (limits.low, limits.high) == (
        1.0 - compute.MIN_HALF_WIDTH_M,
        1.0 + compute.MIN_HALF_WIDTH_M,
    )


def test_clipped_share_counts_the_values_beyond_the_limits():
    x = heavy_tailed()
    s = dhs.summarise(x)
    limits = compute.limits_of_summary(s)
    assert limits is not None
    below, above = compute.clipped_share(s, limits)
    # numpy: the fraction outside; fine bins are 0.2 mm (or 0.01 %), so values within a bin of
    # a limit may fall either side
    near = np.mean(np.minimum(abs(x - limits.low), abs(x - limits.high)) < 1e-3)
    assert abs(below - np.mean(x < limits.low)) <= near
    assert abs(above - np.mean(x > limits.high)) <= near
    assert above > 0.1


def test_histogram_bars_match_numpy_histogram_of_the_pixels():
    x = heavy_tailed()
    s = dhs.summarise(x)
    h = compute.display_histogram(s, bars=80)
    # every pixel is in a bar or counted beyond the window
    assert h.counts.sum() + h.below + h.above == x.size
    reference, _ = np.histogram(x, bins=h.edges)
    near_edge = np.array(
        [np.sum(np.abs(x - e) < 2e-3) for e in h.edges]
    )  # a fine bin (<= 2 mm here) straddling an edge may go to either bar
    slack = near_edge[:-1] + near_edge[1:]
    assert np.all(np.abs(h.counts - reference) <= slack)


def test_histogram_curves_differ_on_heavy_tails_and_agree_on_gaussian_data():
    heavy = compute.display_histogram(dhs.summarise(heavy_tailed()))
    peak = heavy.counts.max()
    assert np.max(np.abs(heavy.gauss_moments - heavy.gauss_robust)) > 0.5 * peak
    rng = np.random.default_rng(3)
    normal = compute.display_histogram(dhs.summarise(rng.normal(0.0, 0.5, 200_000)))
    peak = normal.counts.max()
    # for Gaussian data, NMAD estimates the standard deviation (Höhle & Höhle 2009)
    assert np.max(np.abs(normal.gauss_moments - normal.gauss_robust)) < 0.03 * peak


def test_gaussian_counts_add_up_to_the_count():
    x = np.linspace(-10, 10, 20_001)
    width = 0.1
    y = compute.gaussian_counts(x, 0.5, 1.2, count=1000, bar_width=width)
    # integral of count x width x pdf over x is count x width: trapezoid rule (numpy)
    assert np.trapezoid(y, x) / width == pytest.approx(1000, rel=1e-6)
    assert not compute.gaussian_counts(x, 0.0, 0.0, count=5, bar_width=1).any()


@pytest.mark.parametrize(
    ("rmse", "grade"),
    # ASPRS Positional Accuracy Standards (2014), Table 7.5 (from memory): class X cm means
    # RMSE_z <= X cm
    [(0.05, "5 cm"), (0.0501, "10 cm"), (0.009, "1 cm"), (3.333, "333.3 cm"), (5.0, ">333.3 cm")],
)
def test_tile_grade_is_the_finest_class_whose_rmse_limit_is_met(rmse, grade):
    assert compute.tile_grade(rmse) == grade


def test_worst_tiles_rank_by_abs_median_and_by_spread():
    rows = tiles()
    assert compute.worst_tiles(compute.tile_values(rows, "median"), "median", n=2) == ["t1", "t2"]
    assert compute.worst_tiles(compute.tile_values(rows, "nmad"), "nmad", n=1) == ["t2"]
    grades = compute.tile_values(rows, "grade")
    assert [v.grade for v in grades] == ["33.3 cm", "333.3 cm", "333.3 cm", "10 cm", None]
    assert compute.worst_tiles(grades, "grade", n=2) == ["t1", "t2"]
    assert compute.value_limits(compute.tile_values(rows, "median"), "median") == (-2.0, 2.0)
    with pytest.raises(ValueError, match="statistic"):
        compute.tile_values(rows, "mode")


def test_strata_rows_take_intervals_from_the_document_or_the_summaries():
    rng = np.random.default_rng(5)
    parts = {
        "slope_deg:0-5": dhs.summarise(rng.normal(0, 1, 500)),
        "slope_deg:5-15": dhs.summarise(rng.normal(1, 2, 500)),
    }
    entries = [{"stratum": k, "stats": dhs.statistics(v)} for k, v in parts.items()]
    entries[0]["confidence_95"] = {"median": [-9.0, 9.0]}
    entries.append({"stratum": "cover_group:x/slope_deg:0-5", "stats": {"count": 3}})
    rows = compute.strata_rows(entries, "slope_deg:", parts)
    assert [r.label for r in rows] == ["0-5", "5-15"]
    assert rows[0].median_ci == (-9.0, 9.0)
    assert list(rows[1].median_ci) == confidence_intervals(parts["slope_deg:5-15"])["median"]
    assert compute.strata_rows(entries[1:], "slope_deg:")[0].median_ci is None


def test_recheck_verdicts_per_tile_and_region_changes():
    recheck = {
        "tiles": [{"tile": "t1", "verdict": "regressed"}, {"tile": "t2", "verdict": "improved"}],
        "regions": [
            {
                "region": "A",
                "verdict": "regressed",
                "before": {"count": 5, "nmad": 0.1, "median": 0.0},
                "after": {"count": 5, "nmad": 0.3, "median": 0.1},
            },
            {"region": "B", "verdict": "new", "before": None, "after": {"count": 1}},
        ],
    }
    verdicts = compute.recheck_tiles(recheck, tiles())
    assert [v for _, _, v in verdicts] == ["reused", "regressed", "improved", "reused", "reused"]
    assert compute.region_changes(recheck) == [
        {"region": "A", "verdict": "regressed", "nmad": (0.1, 0.3), "median": (0.0, 0.1)}
    ]


@settings(max_examples=40, deadline=None)
@given(
    st.lists(
        st.lists(st.floats(-50, 50, allow_nan=False), min_size=1, max_size=60),
        min_size=1,
        max_size=6,
    )
)
def test_limits_and_histogram_of_merged_tiles_equal_those_of_all_pixels(parts):
    # invariant: what the figures draw depends on the pixels, not on how tiles split them
    merged = dhs.merge_all(dhs.summarise(np.array(p)) for p in parts)
    whole = dhs.summarise(np.concatenate([np.array(p) for p in parts]))
    a, b = compute.limits_of_summary(merged), compute.limits_of_summary(whole)
    assert a is not None and b is not None
    assert (a.low, a.high) == pytest.approx((b.low, b.high), abs=1e-9)
    ha, hb = compute.display_histogram(merged), compute.display_histogram(whole)
    assert np.array_equal(ha.counts, hb.counts) and (ha.below, ha.above) == (hb.below, hb.above)
    assert ha.counts.sum() + ha.below + ha.above == whole.count


def test_nmad_standard_error_factor_from_the_gaussian_density():
    # the NMAD is 1.4826 x the sample median of |x - m|; for N(0, 1) that median's asymptotic
    # SE is 1 / (2 g(c) sqrt(n)) with g = 2 phi the density of |x| at c = Phi^-1(0.75) (sample
    # median variance 1 / (4 n f^2), common practice); scipy gives phi(c)
    from scipy.stats import norm

    c = norm.ppf(0.75)
    assert pytest.approx(1.4826 / (4 * norm.pdf(c)), rel=1e-3) == compute.NMAD_SE_FACTOR


def test_nmad_interval_covers_sigma_at_its_level_on_gaussian_samples():
    rng = np.random.default_rng(11)
    n, runs, sigma = 400, 2000, 2.0
    x = rng.normal(0.0, sigma, (runs, n))
    med = np.median(x, axis=1, keepdims=True)
    nmad = 1.4826 * np.median(np.abs(x - med), axis=1)  # Höhle & Höhle (2009)
    # the spread of the NMAD over repeated samples is the stated standard error (Monte Carlo)
    assert np.std(nmad) == pytest.approx(compute.NMAD_SE_FACTOR * sigma / math.sqrt(n), rel=0.08)
    covered = [lo <= sigma <= hi for lo, hi in (compute.nmad_interval(v, n) for v in nmad)]
    assert 0.93 <= np.mean(covered) <= 0.97
    assert compute.nmad_interval(1.0, 1) is None
    assert compute.nmad_interval(1.0, 2)[0] == 0.0  # the low end stops at zero


def test_strata_rows_carry_the_nmad_interval():
    s = dhs.summarise(np.random.default_rng(2).normal(0, 1, 900))
    stats = dhs.statistics(s)
    rows = compute.strata_rows([{"stratum": "slope_deg:0-5", "stats": stats}], "slope_deg:")
    assert rows[0].nmad_ci == compute.nmad_interval(float(stats["nmad"]), 900)


def test_tile_statistics_come_from_the_spec_or_the_default():
    assert compute.tile_statistics(None) == compute.DEFAULT_TILE_STATISTICS
    assert compute.tile_statistics({"figures": {"tile_statistics": ["q95_abs"]}}) == ("q95_abs",)
    assert compute.tile_statistics({"figures": {"tile_statistics": []}}) == ()
    with pytest.raises(ValueError, match="tile_statistics"):
        compute.tile_statistics({"figures": {"tile_statistics": ["mode"]}})


@pytest.mark.parametrize("n", [2, 5, 60, 5000])
def test_median_interval_is_the_one_of_confidence_intervals(n):
    s = dhs.summarise(np.random.default_rng(n).standard_t(3, n))
    expected = confidence_intervals(s)["median"]
    assert list(compute.median_interval(s)) == expected
