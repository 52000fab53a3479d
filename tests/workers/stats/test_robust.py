"""Outlier rules and distribution-free confidence intervals."""

from __future__ import annotations

import numpy as np
import pytest

from demaudit.workers.stats import summary as dhs
from demaudit.workers.stats.robust import (
    confidence_intervals,
    order_statistic_ranks,
    outlier_limits,
    within,
    without_outliers,
)


def sample(n=100_000, seed=0, blunders=0.02):
    rng = np.random.default_rng(seed)
    x = rng.normal(0.1, 0.3, n)
    hit = rng.random(n) < blunders
    x[hit] += rng.uniform(5, 50, hit.sum()) * rng.choice([-1.0, 1.0], hit.sum())
    return x


@pytest.mark.parametrize(("rule", "factor"), [("nmad", 5.0), ("rmse", 3.0)])
def test_outlier_removal_matches_numpy_filter(rule, factor):
    # 3 x RMSE: common practice (Höhle & Höhle 2009 credit it to earlier work); 5 x NMAD: ours.
    x = sample()
    s = dhs.summarise(x)
    stats = dhs.statistics(s)
    low, high = outlier_limits(stats, rule=rule, factor=factor)
    kept_np = x[(x >= low) & (x <= high)]
    result = without_outliers(s, rule=rule, factor=factor)
    # the boundary bin (0.2 mm or 0.01 % wide) may hold a value either side of the limit
    assert abs(result["stats"]["count"] - kept_np.size) <= 2
    assert result["removed"] == s.count - result["stats"]["count"]
    assert result["stats"]["median"] == pytest.approx(np.median(kept_np), abs=5e-4)
    assert result["stats"]["mean"] == pytest.approx(kept_np.mean(), abs=5e-4)
    assert result["stats"]["std"] == pytest.approx(kept_np.std(ddof=1), abs=5e-4)


def test_nmad_rule_removes_the_blunders():
    x = sample(blunders=0.02)
    result = without_outliers(dhs.summarise(x), rule="nmad", factor=5.0)
    assert result["removed_fraction"] == pytest.approx(0.02, abs=0.002)
    assert result["stats"]["rmse"] < 0.4


def test_within_empty_interval_is_empty():
    s = dhs.summarise(np.array([1.0, 2.0]))
    assert within(s, 5.0, 6.0).count == 0


def test_ranks_follow_the_order_statistic_formula():
    # ranks n p -/+ z sqrt(n p (1 - p)) (Höhle & Höhle 2009, from memory); n = 10000, p = 0.5:
    # 5000 -/+ 1.96 * 50 = 4902 .. 5098 (1-based), i.e. 4901 .. 5097 0-based
    assert order_statistic_ranks(10_000, 0.5) == (4901, 5097)
    # n = 3, p = 0.95: 2.85 +- 0.74 -> ranks 2 and 4 (1-based); 4 > n: the upper end is open
    assert order_statistic_ranks(3, 0.95) == (1, None)


def test_q95_interval_of_20_values_has_no_upper_end():
    # Höhle & Höhle (2009), from memory (../shared/CHECK_VALUES.md): with n = 20, q95's upper
    # rank 19 + 1.96 sqrt(0.95) = 20.9 -> 21 > 20, so that end is open, not the maximum
    x = np.random.default_rng(3).normal(0.0, 0.2, 20)
    ci = confidence_intervals(dhs.summarise(x))
    low, high = ci["q95_abs"]
    assert high is None
    assert low == pytest.approx(np.sort(np.abs(x))[order_statistic_ranks(20, 0.95)[0]], abs=2e-4)
    assert any("q95_abs: upper end open" in n and "21 > n = 20" in n for n in ci["notes"])
    assert None not in ci["median"]  # median ranks 6 .. 15 lie inside 1 .. 20
    assert "independent pixels" in ci["assumes"]


def test_open_ends_follow_the_rank_formula_for_every_n():
    # ranks n p -/+ z sqrt(n p (1 - p)) (Höhle & Höhle 2009, from memory): q95's upper end
    # closes once n p + 1.96 sqrt(n p (1 - p)) <= n, i.e. n >= 73 (computed: 72 x 0.95 +
    # 1.96 sqrt(3.42) = 72.0246 -> 73 > 72; 73 x 0.95 + 1.96 sqrt(3.4675) = 72.9997 -> 73)
    assert order_statistic_ranks(72, 0.95)[1] is None
    assert order_statistic_ranks(73, 0.95)[1] == 72
    assert order_statistic_ranks(5, 0.5) == (None, 4)  # 2.5 -/+ 2.19 -> 0 .. 5


def test_intervals_match_numpy_order_statistics():
    x = sample(20_000, seed=4)
    ci = confidence_intervals(dhs.summarise(x))
    xs, abs_xs = np.sort(x), np.sort(np.abs(x))
    lo, hi = order_statistic_ranks(x.size, 0.5)
    assert ci["median"] == pytest.approx([xs[lo], xs[hi]], abs=2e-4)
    lo, hi = order_statistic_ranks(x.size, 0.95)
    assert ci["q95_abs"] == pytest.approx([abs_xs[lo], abs_xs[hi]], abs=0.01)


def test_interval_covers_the_true_median_about_95_percent_of_the_time():
    # coverage check by simulation against the known median of a normal distribution (0.1)
    rng = np.random.default_rng(11)
    hits = 0
    trials = 300
    for _ in range(trials):
        lo, hi = confidence_intervals(dhs.summarise(rng.normal(0.1, 0.3, 500)))["median"]
        hits += lo <= 0.1 <= hi
    # binomial(300, 0.95): 3 sigma is about +-0.038
    assert abs(hits / trials - 0.95) < 0.04
