"""The fixed histogram bins (demaudit.workers.stats.bins)."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from demaudit.workers.stats import bins


def test_bins_are_ordered_and_contain_their_values() -> None:
    x = np.concatenate([np.linspace(-60, 60, 100_001), [-2.0, 2.0, -1e-9, 0.0]])
    k = bins.bin_index(x)
    lo, hi = bins.bin_edges(k)
    assert np.all(np.diff(k[np.argsort(x)]) >= 0)
    assert np.all((lo - 1e-12 <= x) & (x <= hi + 1e-12))


def test_a_sparse_histogram_counts_every_value_in_its_bin() -> None:
    rng = np.random.default_rng(5)
    x = np.concatenate([rng.normal(0, 0.5, 20_000), rng.uniform(-80, 80, 500)])
    k, counts = bins.sparse_histogram(x)
    # numpy.unique is the reference for distinct values and their counts
    want_k, want_counts = np.unique(bins.bin_index(x), return_counts=True)
    np.testing.assert_array_equal(k, want_k)
    np.testing.assert_array_equal(counts, want_counts)
    assert counts.dtype == np.int32


@pytest.mark.parametrize(
    ("entries", "far"),
    [
        (50, 0.0),  # sorted
        (20_000, 0.0),  # one dense counter over the bins' span
        (20_000, 1e250),  # a span too wide for that: linear bins dense, the tails sorted
    ],
)
@pytest.mark.parametrize("compiled", [True, False])  # the dense counter compiled or numpy's
def test_added_histograms_sum_the_counts_of_equal_bins(
    entries: int, far: float, compiled: bool, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr(bins, "AVAILABLE", compiled and bins.AVAILABLE)
    rng = np.random.default_rng(entries)
    values = np.concatenate([rng.normal(0, 1, entries), rng.uniform(-60, 60, entries // 10)])
    if far:
        values = np.concatenate([values, [far, -far, far]])
    k = bins.bin_index(values)
    counts = rng.integers(1, 5, k.size).astype(np.int64)
    got_k, got_counts = bins.added_histograms(k, counts)
    want_k = np.unique(k)
    want_counts = np.array([counts[k == b].sum() for b in want_k])
    np.testing.assert_array_equal(got_k, want_k)
    np.testing.assert_array_equal(got_counts, want_counts)
    assert got_k.dtype == got_counts.dtype == np.int64


@settings(max_examples=150, deadline=None)
@given(
    st.lists(st.integers(0, 3_000), min_size=1, max_size=40),
    st.sampled_from([0.0, 1e250]),
    st.booleans(),
    st.integers(0, 2**16),
)
def test_added_parts_equal_added_histograms_of_the_concatenation(sizes, far, repeat, seed):
    # added_histograms on the concatenated parts is the reference; a part whose bins repeat
    # (no histogram here has that) must not lose counts on the dense counter
    rng = np.random.default_rng(seed)
    parts = []
    for size in sizes:
        values = rng.normal(0, 1, size)
        if far and size:
            values[0] = far
        k = np.unique(bins.bin_index(values))
        parts.append((k, rng.integers(1, 9, k.size).astype(np.int64)))
    if repeat and parts[0][0].size:
        k, c = parts[0]
        parts[0] = (np.concatenate([k, k[:1]]), np.concatenate([c, c[:1]]))
    got_k, got_counts = bins.added_parts(parts)
    want_k, want_counts = bins.added_histograms(
        np.concatenate([k for k, _ in parts]).astype(np.int64),
        np.concatenate([c for _, c in parts]).astype(np.int64),
    )
    np.testing.assert_array_equal(got_k, want_k)
    np.testing.assert_array_equal(got_counts, want_counts)
    assert got_k.dtype == got_counts.dtype == np.int64
