"""Invariants of the mergeable summaries (hypothesis)."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from demaudit.workers.stats import quantiles
from demaudit.workers.stats import summary as dhs
from demaudit.workers.stats.bins import RELATIVE_WIDTH, bin_edges
from demaudit.workers.tile.difference import difference

finite_dh = st.floats(min_value=-200, max_value=200, allow_nan=False, width=64)
dh_arrays = arrays(np.float64, st.integers(1, 400), elements=finite_dh)


@given(st.lists(dh_arrays, min_size=1, max_size=6), st.randoms(use_true_random=False))
@settings(max_examples=60, deadline=None)
def test_merge_order_and_grouping_do_not_matter(parts, rnd) -> None:
    summaries = [dhs.summarise(p) for p in parts]
    left_fold = dhs.merge_all(summaries)
    shuffled = summaries[:]
    rnd.shuffle(shuffled)
    # pairwise tree merge of the shuffled list
    while len(shuffled) > 1:
        shuffled = [dhs.merge_all(shuffled[i : i + 2]) for i in range(0, len(shuffled), 2)]
    tree = shuffled[0]
    assert np.array_equal(left_fold.bins, tree.bins)
    assert np.array_equal(left_fold.counts, tree.counts)
    assert left_fold.count == tree.count
    assert left_fold.minimum == tree.minimum and left_fold.maximum == tree.maximum
    assert np.isclose(left_fold.mean, tree.mean, rtol=1e-12, atol=1e-12)


@given(st.lists(dh_arrays, min_size=1, max_size=5))
@settings(max_examples=60, deadline=None)
def test_merge_equals_one_pass(parts) -> None:
    merged = dhs.merge_all(dhs.summarise(p) for p in parts)
    whole = dhs.summarise(np.concatenate(parts))
    assert np.array_equal(merged.bins, whole.bins)
    assert np.array_equal(merged.counts, whole.counts)
    x = np.concatenate(parts)
    got, bound = dhs.statistics(merged), dhs.statistic_bounds(merged)
    assert abs(got["median"] - np.median(x)) <= bound["median"]
    q95 = np.quantile(np.abs(x), 0.95)
    assert abs(got["q95_abs"] - q95) <= bound["q95_abs"]


@given(
    arrays(np.float64, st.integers(2, 300), elements=st.floats(-1, 1, width=64)),
    st.floats(-3, 3, allow_nan=False),
)
@settings(max_examples=80, deadline=None)
def test_constant_shift_moves_median_keeps_nmad(x, c) -> None:
    s_before, s_after = dhs.summarise(x), dhs.summarise(x + c)
    before, after = dhs.statistics(s_before), dhs.statistics(s_after)
    b_before, b_after = dhs.statistic_bounds(s_before), dhs.statistic_bounds(s_after)
    # x + c is rounded once per value: allow a few ulps of c on top of the two bounds
    slack = 4 * np.spacing(max(abs(c), 1.0))
    tol_med = b_before["median"] + b_after["median"] + slack
    assert abs(after["median"] - (before["median"] + c)) <= tol_med
    tol_nmad = b_before["nmad"] + b_after["nmad"] + dhs.NMAD_FACTOR * 2 * slack
    assert abs(after["nmad"] - before["nmad"]) <= tol_nmad


@given(
    arrays(np.float64, (5, 7), elements=st.floats(-1e3, 1e3, width=64)),
    arrays(np.float64, (5, 7), elements=st.floats(-1e3, 1e3, width=64)),
)
@settings(deadline=None)  # the first call may load the compiled subtraction (numba start-up)
def test_dh_is_antisymmetric(a, b) -> None:
    assert np.array_equal(difference(a, b), -difference(b, a))


@given(dh_arrays, dh_arrays)
@settings(max_examples=80, deadline=None)
def test_subtract_undoes_merge(a, b) -> None:
    sa, sb = dhs.summarise(a), dhs.summarise(b)
    rest = dhs.subtract(dhs.merge(sa, sb), sb, minimum=float(a.min()), maximum=float(a.max()))
    assert rest.count == sa.count
    assert np.array_equal(rest.bins, sa.bins) and np.array_equal(rest.counts, sa.counts)
    # the moments come back up to rounding (one merge and one inversion of Chan's formula)
    assert rest.mean == pytest.approx(sa.mean, rel=1e-9, abs=1e-9)
    assert rest.m2 == pytest.approx(sa.m2, rel=1e-6, abs=1e-6)
    assert dhs.statistics(rest)["median"] == dhs.statistics(sa)["median"]


@given(dh_arrays, dh_arrays)
@settings(max_examples=40, deadline=None)
def test_subtracting_what_is_not_there_is_refused(a, b) -> None:
    sa, sb = dhs.summarise(a), dhs.summarise(np.concatenate([b, b, b]))
    in_a = dict(zip(sa.bins.tolist(), sa.counts.tolist(), strict=True))
    pairs = zip(sb.bins.tolist(), sb.counts.tolist(), strict=True)
    contained = all(in_a.get(k, 0) >= n for k, n in pairs)
    if contained:  # b's histogram fits inside a's: nothing to refuse for this draw
        return
    with pytest.raises(ValueError, match="not part of the total"):
        dhs.subtract(sa, sb, minimum=0.0, maximum=0.0)


# -- the reported bound of read-back quantiles holds on adversarial data ------------------------
# Reference: numpy.quantile with its default 'linear' method (method 7), the definition
# summary.quantile follows; NMAD = 1.4826 median(|dh - median(dh)|) (Höhle & Höhle 2009).

PROBABILITIES = (0.0, 0.05, 0.25, 0.5, 0.683, 0.9, 0.95, 1.0)


@st.composite
def adversarial_dh(draw) -> np.ndarray:  # type: ignore[no-untyped-def]
    """Bimodal clusters far apart, two values, sparse values with wide gaps, repeated values,
    values on bin edges, and values next to zero (subnormal-wide bins)."""
    kind = draw(st.sampled_from(["bimodal", "pair", "gaps", "edges", "tiny"]))
    if kind == "tiny":
        tiny = [0.0, -0.0, 5e-324, -5e-324, 2.2e-309, -2.2e-309, 1e-300, -3e-305, 1e-3]
        return np.array(draw(st.lists(st.sampled_from(tiny), min_size=1, max_size=8)))
    if kind == "bimodal":
        centre = draw(st.floats(0.5, 5000.0))
        spread = draw(st.floats(0.0, 1.0))
        n_low, n_high = draw(st.integers(1, 60)), draw(st.integers(1, 60))
        offsets = draw(arrays(np.float64, n_low + n_high, elements=st.floats(0.0, 1.0)))
        low = -centre - spread * offsets[:n_low]
        high = centre + spread * offsets[n_low:]
        return np.concatenate([low, high]) + draw(st.floats(-10.0, 10.0))
    if kind == "pair":
        return draw(arrays(np.float64, 2, elements=st.floats(-5000.0, 5000.0, width=64)))
    if kind == "gaps":
        values = draw(arrays(np.float64, st.integers(1, 12), elements=finite_dh))
        return np.repeat(values, draw(st.integers(1, 4)))
    k = draw(arrays(np.int64, st.integers(1, 40), elements=st.integers(-30000, 30000)))
    return bin_edges(k)[0]  # lower edges of linear and geometric bins


@given(adversarial_dh())
@settings(max_examples=300, deadline=None)
def test_reported_bounds_hold_against_numpy(x) -> None:
    s = dhs.summarise(x)
    p = np.array(PROBABILITIES)
    got, bound = quantiles.quantile(s, p), quantiles.quantile_bounds(s, p)
    assert np.all(np.abs(got - np.quantile(x, p)) <= bound)
    for center in (0.0, float(np.median(x))):
        got = quantiles.abs_quantile(s, p, center=center)
        bound = quantiles.abs_quantile_bounds(s, p, center=center)
        assert np.all(np.abs(got - np.quantile(np.abs(x - center), p)) <= bound)
    stats, bounds = dhs.statistics(s), dhs.statistic_bounds(s)
    exact = {
        "median": np.median(x),
        "nmad": dhs.NMAD_FACTOR * np.median(np.abs(x - np.median(x))),
        "q683_abs": np.quantile(np.abs(x), 0.683),
        "q95_abs": np.quantile(np.abs(x), 0.95),
    }
    for key, value in exact.items():
        assert abs(stats[key] - value) <= bounds[key], key


def test_bimodal_median_bound_comes_from_the_bracketing_bins() -> None:
    # +-3,000 m clusters: the median interpolates between bins 0.3 m wide (0.01 % of 3,000 m);
    # the old value-based width (0.2 mm at a median near 0) did not hold. numpy as reference.
    x = np.concatenate([np.random.default_rng(1).normal(m, 0.05, 1000) for m in (-3000, 3000)])
    s = dhs.summarise(x)
    error = abs(float(quantiles.quantile(s, 0.5)) - np.median(x))
    bound = dhs.statistic_bounds(s)["median"]
    assert dhs.quantile_bound_m(np.median(x)) < error <= bound  # the old width did not hold
    assert bound <= 3000.2 * RELATIVE_WIDTH  # half of each of the two bracketing bins
