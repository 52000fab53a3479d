"""Invariants of the mergeable summaries (hypothesis)."""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from workers import summary as dhs
from workers.difference import difference

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
    got = dhs.statistics(merged)
    assert abs(got["median"] - np.median(x)) <= dhs.quantile_bound_m(np.median(x))
    q95 = np.quantile(np.abs(x), 0.95)
    assert abs(got["q95_abs"] - q95) <= dhs.quantile_bound_m(q95)


@given(
    arrays(np.float64, st.integers(2, 300), elements=st.floats(-1, 1, width=64)),
    st.floats(-3, 3, allow_nan=False),
)
@settings(max_examples=80, deadline=None)
def test_constant_shift_moves_median_keeps_nmad(x, c) -> None:
    before = dhs.statistics(dhs.summarise(x))
    after = dhs.statistics(dhs.summarise(x + c))
    tol_med = dhs.quantile_bound_m(before["median"]) + dhs.quantile_bound_m(after["median"])
    assert abs(after["median"] - (before["median"] + c)) <= tol_med
    tol_nmad = dhs.nmad_bound_m(before["median"], before["nmad"]) + dhs.nmad_bound_m(
        after["median"], after["nmad"]
    )
    assert abs(after["nmad"] - before["nmad"]) <= tol_nmad


@given(
    arrays(np.float64, (5, 7), elements=st.floats(-1e3, 1e3, width=64)),
    arrays(np.float64, (5, 7), elements=st.floats(-1e3, 1e3, width=64)),
)
def test_dh_is_antisymmetric(a, b) -> None:
    assert np.array_equal(difference(a, b), -difference(b, a))
