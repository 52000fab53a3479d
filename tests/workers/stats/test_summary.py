"""Mergeable dh summaries against numpy and scipy on the same values."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import median_abs_deviation, norm

from demaudit.workers.stats import summary as dhs


def heavy_tailed(
    n: int, *, seed: int, sigma: float = 0.3, bias: float = 0.25, blunders: float = 0.02
) -> np.ndarray:
    """Normal dh plus a fraction of blunders of +-5 to 50 m."""
    rng = np.random.default_rng(seed)
    dh = rng.normal(bias, sigma, n)
    hit = rng.random(n) < blunders
    dh[hit] += rng.uniform(5, 50, hit.sum()) * rng.choice([-1.0, 1.0], hit.sum())
    return dh


def reference_statistics(x: np.ndarray) -> dict[str, float]:
    # General-purpose reference libraries (../shared/CHECK_VALUES.md): numpy.median,
    # numpy.quantile and scipy.stats.median_abs_deviation(scale='normal').
    return {
        "count": x.size,
        "mean": float(np.mean(x)),
        "std": float(np.std(x, ddof=1)),
        "rmse": float(np.sqrt(np.mean(x**2))),
        "median": float(np.median(x)),
        "nmad": float(median_abs_deviation(x, scale="normal")),
        "q683_abs": float(np.quantile(np.abs(x), 0.683)),
        "q95_abs": float(np.quantile(np.abs(x), 0.95)),
        "min": float(x.min()),
        "max": float(x.max()),
    }


def assert_within_bound(s: dhs.DhSummary, want: dict) -> None:
    """The summary's statistics against the reference, within the bounds it reports."""
    got, bound = dhs.statistics(s), dhs.statistic_bounds(s)
    assert got["count"] == want["count"]
    for key in ("mean", "std", "rmse", "min", "max"):
        assert got[key] == pytest.approx(want[key], rel=1e-9, abs=1e-12), key
    for key in ("median", "nmad", "q683_abs", "q95_abs"):
        assert abs(got[key] - want[key]) <= bound[key], key


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_heavy_tailed_statistics_match_numpy_and_scipy(seed: int) -> None:
    x = heavy_tailed(200_000, seed=seed)
    assert_within_bound(dhs.summarise(x), reference_statistics(x))


def test_stated_bound_is_the_issue_bound() -> None:
    # The issue's bound: 1 mm, or 0.1 % of the value where that is larger. It holds for dense
    # data, where each quantile's two order statistics share a bin.
    for value in (0.0, 0.3, 2.5, 40.0):
        assert dhs.quantile_bound_m(value) <= max(1e-3, 1e-3 * abs(value))
    assert dhs.nmad_bound_m(0.25, 0.3) <= 1e-3
    s = dhs.summarise(heavy_tailed(200_000, seed=5))
    stats, bound = dhs.statistics(s), dhs.statistic_bounds(s)
    for key in ("median", "nmad", "q683_abs", "q95_abs"):
        assert bound[key] <= max(1e-3, 1e-3 * abs(stats[key])), key


def test_sparse_values_with_gaps() -> None:
    # the median of four values interpolates 0 and 10 m: half a 0.2 mm bin plus half of the
    # 1 mm bin at 10 m (0.01 %), more than the width at the value 5 m (0.5 mm)
    x = np.array([0.0, 10.0, 10.5, -3.0])
    s = dhs.summarise(x)
    assert_within_bound(s, reference_statistics(x))
    assert dhs.statistic_bounds(s)["median"] == pytest.approx(0.5 * 2e-4 + 0.5 * 1e-3, rel=1e-3)


def test_nan_and_inf_are_ignored() -> None:
    x = np.array([1.0, np.nan, 2.0, np.inf, -np.inf, 3.0])
    assert dhs.summarise(x).count == 3
    assert dhs.statistics(dhs.summarise(x))["median"] == pytest.approx(2.0, abs=2e-4)


def test_empty_summary_reports_count_zero_and_no_values() -> None:
    stats = dhs.statistics(dhs.summarise(np.array([np.nan])))
    assert stats["count"] == 0
    assert all(stats[k] is None for k in dhs.STAT_KEYS if k != "count")


def test_single_value() -> None:
    stats = dhs.statistics(dhs.summarise(np.array([0.7])))
    assert stats["median"] == pytest.approx(0.7, abs=2e-4)
    assert stats["std"] == 0.0
    assert stats["nmad"] == pytest.approx(0.0, abs=1e-3)


def test_normal_dh_gaussian_equivalents() -> None:
    # For normal dh with mean 0: Q(0.683) of |dh| = 1.00064 sigma, Q(0.95) = 1.95996 sigma,
    # NMAD -> sigma (../shared/CHECK_VALUES.md, computed from the normal distribution); checked
    # here against scipy.stats.norm too.
    sigma, n = 0.3, 1_000_000
    x = np.random.default_rng(7).normal(0.0, sigma, n)
    stats = dhs.statistics(dhs.summarise(x))
    assert norm.ppf((1 + 0.683) / 2) == pytest.approx(1.00064, abs=1e-5)
    assert norm.ppf((1 + 0.95) / 2) == pytest.approx(1.95996, abs=1e-5)
    # sampling error of a quantile of 1e6 values is about 0.1 % of sigma; allow 0.5 %.
    assert stats["q683_abs"] / sigma == pytest.approx(1.00064, rel=5e-3)
    assert stats["q95_abs"] / sigma == pytest.approx(1.95996, rel=5e-3)
    assert stats["nmad"] / sigma == pytest.approx(1.0, rel=5e-3)


def test_nmad_constant() -> None:
    # 1.4826 = 1 / Phi^-1(0.75) (Höhle & Höhle 2009; constant computed with scipy).
    assert 1.0 / norm.ppf(0.75) == pytest.approx(dhs.NMAD_FACTOR, abs=1e-4)


def test_summary_stays_small() -> None:
    x = heavy_tailed(1_000_000, seed=3)
    # a tile of a million pixels with 2 % blunders: a few hundred kilobytes at most
    assert dhs.summarise(x).nbytes < 600_000
