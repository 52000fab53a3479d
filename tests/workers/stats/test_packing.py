"""The histogram's packed form for pickling: the same values and dtypes back, fewer bytes."""

from __future__ import annotations

import pickle

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from demaudit.workers.stats import packing
from demaudit.workers.stats import summary as dhs
from demaudit.workers.stats.bins import sparse_histogram

_INTS = st.sampled_from([np.int8, np.int16, np.int32, np.int64, np.uint8, np.uint32, np.uint64])


@pytest.fixture(params=[True, False], ids=["compiled", "numpy"])
def either_path(request: pytest.FixtureRequest, monkeypatch: pytest.MonkeyPatch) -> bool:
    """Pack and unpack with the compiled loops (when numba is there) and with numpy."""
    monkeypatch.setattr(packing, "AVAILABLE", request.param and packing.AVAILABLE)
    return bool(request.param)


def assert_same(got: np.ndarray, want: np.ndarray) -> None:
    assert got.dtype == want.dtype
    assert got.shape == want.shape
    np.testing.assert_array_equal(got, want)


# either_path patches a module flag once for all examples, as meant
@settings(
    max_examples=300, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(
    bins=_INTS.flatmap(lambda t: arrays(t, st.integers(0, 40))),
    counts_dtype=_INTS,
    data=st.data(),
    sort=st.booleans(),
)
def test_unpack_gives_back_the_values_and_dtypes(
    bins, counts_dtype, data, sort, either_path
) -> None:
    """Any integer arrays, sorted or not, repeated bins, negative or huge counts: unpacked as
    they were (the packing only chooses a form), by either path."""
    if sort:
        bins = np.unique(bins)
    counts = data.draw(arrays(counts_dtype, bins.size))
    got_bins, got_counts = packing.unpack(packing.pack(bins, counts))
    assert_same(got_bins, bins)
    assert_same(got_counts, counts)


@pytest.mark.parametrize(
    ("bins", "counts"),
    [
        (np.array([-(2**62) + 1, 2**62 - 1], np.int64), np.array([1, 2], np.int32)),  # widest steps
        (np.array([-(2**63), 2**63 - 1], np.int64), np.array([1, 2], np.int64)),  # would overflow
        (np.array([5], np.int32), np.array([2**40], np.int64)),  # beyond uint32
        (np.zeros(0, np.int32), np.zeros(0, np.int32)),
        (np.array([0, 3 * 2**61, -(2**61) - 5]), np.array([1, 2, 3])),  # steps wrap in int64
        (np.array([1.0, 2.0]), np.array([1, 1], np.int32)),  # not integers
        (np.arange(6, dtype=np.int32).reshape(2, 3), np.ones((2, 3), np.int32)),  # not 1-D
        (np.array([1, 5, 900], ">i4"), np.array([3, 300, 2], ">i8")),  # big-endian
    ],
)
def test_edges_of_the_packing(bins: np.ndarray, counts: np.ndarray, either_path: bool) -> None:
    got_bins, got_counts = packing.unpack(packing.pack(bins, counts))
    assert_same(got_bins, bins)
    assert_same(got_counts, counts)


def test_a_tile_histogram_packs_to_a_third_or_less() -> None:
    """A histogram as a tile makes one (2.25 million values, 0.3 m spread and blunders): the
    pickled summary takes less than a third of the bytes of its int32 arrays."""
    rng = np.random.default_rng(7)
    x = rng.normal(0.2, 0.3, 2_250_000)
    x[::50] += rng.uniform(5, 50, x[::50].size)
    bins, counts = sparse_histogram(x)
    raw = bins.nbytes + counts.nbytes
    first, steps, packed_counts, _, _ = packing.pack(bins, counts)
    assert first == bins[0]
    assert steps[0].dtype == np.uint8 and packed_counts[0].dtype == np.uint8
    summary = dhs.summarise(x)
    assert len(pickle.dumps(summary, protocol=5)) < raw / 3


def test_both_paths_pack_to_the_same_form(monkeypatch: pytest.MonkeyPatch) -> None:
    """The compiled loops make the numpy path's packed form (values and dtypes), so either
    side of a trip may take either path; wide counts and steps of each listed width."""
    rng = np.random.default_rng(11)
    bins = np.unique(rng.integers(-(2**40), 2**40, 5_000)).astype(np.int64)
    bins[-3:] += np.array([2**16, 2**33, 2**50])  # steps beyond uint8, uint16 and uint32
    counts = rng.integers(0, 300, bins.size).astype(np.int32)
    counts[::97] = 2**31 - 1
    compiled = packing.pack(bins, counts)
    monkeypatch.setattr(packing, "AVAILABLE", False)
    plain = packing.pack(bins, counts)
    assert compiled[0] == plain[0] and compiled[3:] == plain[3:]
    for got, want in zip(compiled[1:3], plain[1:3], strict=True):
        for got_part, want_part in zip(got, want, strict=True):
            assert_same(got_part, want_part)


@pytest.mark.parametrize("part", [1, 2])  # the steps, the counts
@pytest.mark.parametrize("change", [-1, 1])  # a listed value lost, one too many
def test_a_packed_form_that_does_not_hold_together_is_refused(
    part: int, change: int, either_path: bool
) -> None:
    """Escaped bytes and listed values that disagree (a damaged transfer) raise ValueError on
    either path, never read beyond the listed values or leave a value unset."""
    bins = np.array([3, 4, 600, 601, 100_000], np.int64)
    counts = np.array([1, 900, 2, 70_000, 5], np.int32)
    packed = list(packing.pack(bins, counts))
    small, listed = packed[part]
    listed = listed[:-1] if change < 0 else np.append(listed, listed[:1])
    packed[part] = (small, listed)
    with pytest.raises(ValueError):
        packing.unpack(tuple(packed))  # type: ignore[arg-type]


def test_a_pickled_summary_is_the_same_summary() -> None:
    """Moments, extremes, bins and counts (values and dtypes) survive pickling; a summary held
    twice stays one object (the region that holds the whole tile shares the tile's)."""
    rng = np.random.default_rng(3)
    summary = dhs.summarise(np.concatenate([rng.normal(0, 0.5, 10_000), [-80.0, 1e4]]))
    back, again = pickle.loads(pickle.dumps([summary, summary], protocol=5))
    assert back is again
    fields = ("count", "mean", "m2", "minimum", "maximum")
    assert [getattr(back, f) for f in fields] == [getattr(summary, f) for f in fields]
    assert_same(back.bins, summary.bins)
    assert_same(back.counts, summary.counts)
    empty = pickle.loads(pickle.dumps(dhs.empty()))
    assert_same(empty.bins, dhs.empty().bins)
    assert empty.count == 0 and empty.minimum == np.inf
