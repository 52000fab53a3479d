"""The stats package's compiled loops give the bits of their numpy twins: histogram adds
(bins.added_parts) and the bisection of the |dh - centre| quantiles (quantiles.py)."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from demaudit.workers.stats import bins, quantiles
from demaudit.workers.stats import kernels as stats_kernels
from demaudit.workers.stats import summary as dhs
from tests.properties.test_summary_properties import adversarial_dh

pytest.importorskip("numba")


def test_add_within_counts_repeated_bins_like_numpy_add_at() -> None:
    rng = np.random.default_rng(3)
    dense_bins = rng.integers(-50, 50, 2_000)  # repeats on purpose
    counts = rng.integers(1, 1_000, dense_bins.size)
    got = np.zeros(100, np.int64)
    assert stats_kernels.add_within(got, dense_bins, counts, -50)
    want = np.zeros(100, np.int64)
    np.add.at(want, dense_bins + 50, counts)  # numpy as the reference
    np.testing.assert_array_equal(got, want)


def test_added_parts_compiled_and_in_numpy_agree(monkeypatch: pytest.MonkeyPatch) -> None:
    rng = np.random.default_rng(4)
    parts = []
    for _ in range(40):  # enough entries for the dense add
        b = np.unique(rng.integers(-30_000, 60_000, 3_000))
        parts.append((b.astype(np.int32), rng.integers(1, 99, b.size).astype(np.int64)))
    compiled = bins.added_parts(parts)
    monkeypatch.setattr(bins, "AVAILABLE", False)
    in_numpy = bins.added_parts(parts)
    for got, want in zip(compiled, in_numpy, strict=True):
        assert got.dtype == want.dtype
        np.testing.assert_array_equal(got, want)


@pytest.mark.parametrize("compiled", [True, False])
@pytest.mark.parametrize("fault", ["above", "below"])
def test_added_parts_of_unsorted_parts_equal_one_sort(
    compiled: bool, fault: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A part whose bins do not rise: falling, its first bin above every part's last
    ("above"); or shuffled, with repeats, reaching below every part's first ("below"). The
    compiled add checks its bounds as it goes and the numpy add checks the order first, so
    either gives the sum of one sort over all entries."""
    monkeypatch.setattr(bins, "AVAILABLE", compiled and bins.AVAILABLE)
    rng = np.random.default_rng(9)
    parts = []
    for k in range(12):
        b = np.unique(rng.integers(-5_000, 20_000, 1_500))
        c = rng.integers(1, 50, b.size)
        if k == 3 and fault == "above":
            b, c = b[::-1] + 10_000, c[::-1]
        if k == 7 and fault == "below":
            order = rng.permutation(b.size)
            b, c = np.concatenate([b[order], b[:5] - 9_000]), np.concatenate([c[order], c[:5]])
        parts.append((b.astype(np.int64), c.astype(np.int64)))
    got = bins.added_parts(parts)
    want = bins.added_histograms(
        np.concatenate([b for b, _ in parts]), np.concatenate([c for _, c in parts])
    )
    for g, w in zip(got, want, strict=True):
        assert g.dtype == w.dtype
        np.testing.assert_array_equal(g, w)


@given(
    dense=arrays(
        st.sampled_from([np.int32, np.int64]),
        st.integers(0, 400),
        elements=st.one_of(st.just(0), st.integers(-(2**31), 2**31 - 1)),
    ),
    low=st.integers(-(2**40), 2**40),
    reverse=st.booleans(),
)
@settings(max_examples=200, deadline=None)
def test_dense_entries_compiled_equal_numpys_nonzero(
    dense: np.ndarray, low: int, reverse: bool
) -> None:
    # mostly zeros (as the histograms' counters are), any sign, a reversed (strided) view too
    view = dense[::-1] if reverse else dense
    got = bins.dense_entries(view, low)
    with pytest.MonkeyPatch.context() as m:
        m.setattr(bins, "AVAILABLE", False)
        want = bins.dense_entries(view, low)
    (at,) = np.nonzero(view)  # numpy as the reference
    for b, c in (got, want):
        assert b.dtype == c.dtype == np.int64
        np.testing.assert_array_equal(b, at + low)
        np.testing.assert_array_equal(c, view[at])


def _bits(x: np.ndarray) -> np.ndarray:
    return np.asarray(x, dtype=np.float64).view(np.int64)  # -0.0 and 0.0 told apart


@st.composite
def distances(draw: st.DrawFn) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Distances of ascending bins from a centre (near or far, as the |dh - centre| brackets
    compute them), sometimes shuffled or with NaN / -0.0; counts (zeros too) and ranks."""
    edges = draw(arrays(np.float64, st.integers(1, 60), elements=st.floats(-50, 50, width=32)))
    lo = np.sort(edges)
    hi = lo + draw(st.sampled_from([0.0, 0.001, 0.5]))
    center = draw(st.one_of(st.sampled_from([0.0, -0.0]), st.floats(-60, 60)))
    if draw(st.booleans()):
        values = np.maximum(np.maximum(lo - center, center - hi), 0.0)
    else:
        values = np.maximum(np.abs(lo - center), np.abs(hi - center))
    shape = draw(st.sampled_from(["valley", "shuffled", "nan", "negative zero"]))
    if shape == "shuffled":
        values = np.array(draw(st.permutations(list(values))))
    elif shape == "nan":
        values[draw(st.integers(0, values.size - 1))] = np.nan
    elif shape == "negative zero":
        values[draw(st.integers(0, values.size - 1))] = -0.0
    counts = np.array(draw(st.lists(st.integers(0, 5), min_size=values.size, max_size=values.size)))
    counts[draw(st.integers(0, values.size - 1))] += 1  # at least one value
    ranks = np.array(draw(st.lists(st.integers(0, int(counts.sum()) - 1), min_size=1, max_size=8)))
    return values, counts.astype(draw(st.sampled_from([np.int32, np.int64]))), ranks


@given(distances())
@settings(max_examples=300, deadline=None)
def test_valley_merge_gives_the_sorts_bits(case: tuple[np.ndarray, np.ndarray, np.ndarray]) -> None:
    values, counts, ranks = case
    got = quantiles._weighted_order_statistic(values, counts, ranks)
    with pytest.MonkeyPatch.context() as m:
        m.setattr(quantiles, "AVAILABLE", False)
        want = quantiles._weighted_order_statistic(values, counts, ranks)
    np.testing.assert_array_equal(_bits(got), _bits(want))


def test_valley_merge_is_taken_for_bin_distances() -> None:
    # the fast path must actually run (else the test above compares numpy with itself)
    lo = np.arange(-5.0, 5.0, 0.5)
    values = np.maximum(np.maximum(lo - 0.2, 0.2 - (lo + 0.5)), 0.0)
    out = np.empty(3)
    ranks = np.array([0, 7, 19])
    assert stats_kernels.valley_order_statistics(values, np.ones(lo.size, np.int64), ranks, out)
    np.testing.assert_array_equal(out, np.sort(values)[ranks])
    ones = np.ones(lo.size, np.int64)
    bottom = int(np.argmin(values))
    assert values[bottom] == 0.0
    values[bottom] = -0.0  # still a valley, but with a negative zero: left to the sort
    assert not stats_kernels.valley_order_statistics(values, ones, ranks, out)
    for shape in ([3.0, 1.0, 2.0, 0.0], [0.0, 2.0, 1.0, 3.0], [2.0, 0.0, 3.0, 1.0]):  # no valleys
        assert not stats_kernels.valley_order_statistics(np.array(shape), ones[:4], ranks[:2], out)


def _both_ways(s: dhs.DhSummary, ranks: np.ndarray, center: float, monkeypatch) -> tuple:  # type: ignore[no-untyped-def]
    with monkeypatch.context() as m:
        m.setattr(quantiles, "AVAILABLE", False)
        in_numpy = quantiles.abs_order_statistics(s, ranks, center)
    return quantiles.abs_order_statistics(s, ranks, center), in_numpy


@given(adversarial_dh(), st.sampled_from(["zero", "median", "min", "max", "far"]))
@settings(max_examples=200, deadline=None)
def test_compiled_bisection_gives_numpys_bits(x: np.ndarray, where: str) -> None:
    # adversarial data: far-apart clusters, bin edges, subnormal-wide bins next to zero
    s = dhs.summarise(x)
    center = {
        "zero": 0.0,
        "median": float(np.median(x)),
        "min": float(x.min()),
        "max": float(x.max()),
        "far": float(x.max()) + 1e6,
    }[where]
    ranks = np.unique(np.linspace(0, s.count - 1, 7).astype(np.int64))
    with pytest.MonkeyPatch.context() as monkeypatch:
        got, want = _both_ways(s, ranks, center, monkeypatch)
    np.testing.assert_array_equal(got, want)  # bit for bit, NaN where numpy has NaN


@given(arrays(np.float64, st.integers(1, 3_000), elements=st.floats(-60.0, 60.0)))
@settings(max_examples=60, deadline=None)
def test_compiled_statistics_equal_numpys(x: np.ndarray) -> None:
    s = dhs.summarise(x)
    with pytest.MonkeyPatch.context() as monkeypatch:
        monkeypatch.setattr(quantiles, "AVAILABLE", False)
        in_numpy = dhs.statistics(s)
    assert dhs.statistics(s) == in_numpy


TINY = 5e-324  # the smallest subnormal: slopes across it overflow


@st.composite
def knots_and_values(draw):  # type: ignore[no-untyped-def]
    """Ascending knots with repeats (a bin's upper edge is the next one's lower edge), zero-
    width and subnormal-wide segments, ascending values; points on, between and beyond them."""
    steps = draw(
        arrays(np.float64, st.integers(1, 30), elements=st.sampled_from([0.0, TINY, 1e-3, 1.0]))
    )
    x = draw(st.floats(-10.0, 10.0)) + np.cumsum(steps)
    f = np.cumsum(draw(arrays(np.float64, x.size, elements=st.sampled_from([0.0, 1.0, 7.0]))))
    if draw(st.booleans()):  # infinite ends: 0 x inf and inf - inf on the way (numpy's retries)
        x = np.concatenate([[-np.inf], x, [np.inf] * draw(st.integers(0, 1))])
        f = np.concatenate([[f[0]], f, [np.inf] * (x.size - f.size - 1)])
        f[-draw(st.integers(1, 2)) :] = np.inf
    on = draw(st.lists(st.sampled_from(x.tolist()), max_size=5))
    near = [float(np.nextafter(v, d)) for v in on for d in (-np.inf, np.inf)]
    between = draw(st.lists(st.floats(float(x[0]) - 1, float(x[-1]) + 1), max_size=5))
    odd = [np.nan, np.inf, -np.inf]
    return x, f, np.array(on + near + between + odd)


@given(knots_and_values())
@settings(max_examples=300, deadline=None)
def test_interp_at_gives_numpy_interps_bits(case) -> None:  # type: ignore[no-untyped-def]
    x, f, points = case
    want = np.interp(points, x, f)  # numpy as the reference
    with np.errstate(invalid="ignore", over="ignore"):
        got = np.array([stats_kernels.interp_at(float(v), x, f) for v in points])
    np.testing.assert_array_equal(got, want)


@pytest.mark.parametrize("center", [np.nan, np.inf, -np.inf])
def test_bisection_from_a_centre_that_is_no_number_gives_numpys(center: float) -> None:
    x, f = quantiles.layout_of(dhs.summarise(np.linspace(-3.0, 5.0, 50))).knots
    target = np.array([10.5, 40.5])
    got = np.empty(2)
    stats_kernels.abs_bisection(x, f, center, target, 9.0, quantiles._STEPS, got)
    want = quantiles._abs_bisection_numpy(x, f, center, target, 9.0)
    np.testing.assert_array_equal(got, want)
