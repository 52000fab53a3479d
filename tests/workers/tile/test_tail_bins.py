"""The tail-bin tables (workers/tile/tail_bins.py) against bins.bin_index, the definition of the
bins (the compiled tail sweep's use of them: tests/workers/tile/test_keyed_summary.py)."""

from __future__ import annotations

import numpy as np

from demaudit.workers.stats import bins
from demaudit.workers.tile.tail_bins import slot_rows, tail_table


def test_tail_table_edges_are_bin_index_edges() -> None:
    """Each tail bin's lower edge is the smallest float bin_index puts in that bin, and every
    slot's first bin is bin_index's bin of the slot's lowest value (both checked whole)."""
    first, edges = tail_table()
    lower = edges[np.isfinite(edges)]
    j = np.arange(lower.size)
    np.testing.assert_array_equal(bins.bin_index(lower), bins.K_LIMIT + j)
    below = np.nextafter(lower[1:], 0)
    np.testing.assert_array_equal(bins.bin_index(below), bins.K_LIMIT + j[1:] - 1)
    slots = np.arange(first.size, dtype=np.int64)
    lowest = ((slots + (0x4000000000000000 >> 40)) << 40).view(np.float64)
    np.testing.assert_array_equal(first, bins.bin_index(lowest) - bins.K_LIMIT)


def test_slot_rows_hold_each_slots_first_bin_and_the_next_three_edges() -> None:
    """The sweep's one-lookup layout holds the same numbers as the two tables."""
    first, edges = tail_table()
    rows = slot_rows()
    assert rows.shape == (first.size, 4)
    np.testing.assert_array_equal(rows[:, 0].astype(np.int64), first)
    for k in (1, 2, 3):
        np.testing.assert_array_equal(rows[:, k], edges[first + k])
