"""Invariants of the mergeable summaries (hypothesis)."""

from __future__ import annotations

import numpy as np
import pytest
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
