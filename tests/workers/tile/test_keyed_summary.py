"""The fused keyed sweep (keyed_summary.summarise_keyed) against summarise_cells on the same
cells: the same summaries bit for bit (bins, counts, extremes and moments), whichever way its
tail values are binned (slot table and dense counters, the listed entries, summary.bin_index)."""

from __future__ import annotations

import numpy as np
import pytest

from demaudit.workers.stats import summary as dhs
from demaudit.workers.tile import kernels, keyed_summary
from demaudit.workers.tile.tail_bins import tail_table

pytestmark = pytest.mark.skipif(not kernels.AVAILABLE, reason="numba is not installed")


def assert_identical(got: dhs.DhSummary, want: dhs.DhSummary, where: str) -> None:
    assert got.count == want.count, where
    assert (got.mean, got.m2, got.minimum, got.maximum) == (
        want.mean,
        want.m2,
        want.minimum,
        want.maximum,
    ), where
    assert got.bins.dtype == want.bins.dtype and got.counts.dtype == want.counts.dtype, where
    np.testing.assert_array_equal(got.bins, want.bins, err_msg=where)
    np.testing.assert_array_equal(got.counts, want.counts, err_msg=where)


def heavy_tails(seed: int, shape: tuple[int, int] = (120, 150)) -> np.ndarray:
    """dh with most values beyond +-2 m (canopy, blunders), voids and the awkward values."""
    rng = np.random.default_rng(seed)
    dh = rng.normal(0.1, 0.4, shape)
    canopy = rng.random(shape) < 0.6
    dh[canopy] = rng.gamma(2.0, 8.0, canopy.sum()) * rng.choice([-1, 1], canopy.sum())
    far = rng.random(shape) < 0.01
    dh[far] = rng.uniform(-5e4, 5e4, far.sum())  # beyond the slots (2^15 m) for some
    dh[rng.random(shape) < 0.03] = np.nan
    edges = tail_table()[1][: dh.size // 20]
    awkward = np.concatenate([edges, np.nextafter(edges, 0), -edges, -np.nextafter(edges, 0)])
    awkward = np.concatenate([awkward, [2.0, -2.0, np.nextafter(2.0, 0), 7e5, -7e5, np.inf]])
    flat = dh.reshape(-1)
    flat[rng.choice(flat.size, awkward.size, replace=False)] = awkward
    return dh


@pytest.mark.parametrize("seed", [0, 1])
@pytest.mark.parametrize("tail_counters", [2_000_000, 600, 0])  # dense tails; few; none
@pytest.mark.parametrize(
    ("with_codes", "pattern_grid"), [(True, True), (False, True), (True, False), (False, False)]
)  # the sweep is compiled apart for no land cover and for one pattern for every pixel
def test_fused_sweep_equals_summarise_cells(
    seed: int,
    tail_counters: int,
    with_codes: bool,
    pattern_grid: bool,
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    monkeypatch.setattr(keyed_summary, "MAX_TAIL_COUNTERS", tail_counters)
    dh = heavy_tails(seed)
    rng = np.random.default_rng(seed + 10)
    bands = rng.integers(0, 4, dh.shape).astype(np.uint8)
    codes = rng.choice(np.array([0, 1, 2, 255], dtype=np.uint8), dh.shape)  # 255: excluded
    if not with_codes:
        codes = np.zeros(dh.shape, np.uint8)
    patterns = rng.integers(0, 3, dh.shape).astype(np.int32)
    if not pattern_grid:
        patterns = np.full(dh.shape, 2, np.int32)
    n_cells = 3 * 4
    got = keyed_summary.summarise_keyed(
        dh, bands=bands, codes=codes if with_codes else None,
        patterns=patterns if pattern_grid else 2, n_band_codes=4, n_cells=n_cells,
        n_patterns=3,
    )  # fmt: skip
    assert got is not None
    per_key, dropped = got
    excluded = codes == 255
    cells = patterns.astype(np.int64) * n_cells + codes.astype(np.int64) * 4 + bands
    cells[excluded] = -1
    want = keyed_summary.summarise_cells(dh.ravel(), cells.ravel(), 3 * n_cells)
    assert dropped == int(np.count_nonzero(excluded & np.isfinite(dh)))
    for c in range(3 * n_cells):
        assert_identical(per_key.union([c]), want.union([c]), f"cell {c}")
    assert_identical(per_key.union(range(3 * n_cells)), want.union(range(3 * n_cells)), "all")


def test_fused_sweep_declines_what_it_cannot_count(monkeypatch: pytest.MonkeyPatch) -> None:
    dh = np.zeros((4, 4))
    kwargs = dict(bands=np.zeros((4, 4), np.uint8), codes=None, patterns=None, n_band_codes=1)
    assert keyed_summary.summarise_keyed(dh, n_cells=1, n_patterns=1, **kwargs) is not None
    monkeypatch.setattr(keyed_summary, "MAX_COUNTERS", keyed_summary._WIDTH)
    assert keyed_summary.summarise_keyed(dh, n_cells=2, n_patterns=1, **kwargs) is None
    monkeypatch.setattr(kernels, "AVAILABLE", False)
    assert keyed_summary.summarise_keyed(dh, n_cells=1, n_patterns=1, **kwargs) is None


def test_one_pattern_for_every_pixel_equals_that_pattern_on_the_grid() -> None:
    dh = heavy_tails(4)
    rng = np.random.default_rng(14)
    bands = rng.integers(0, 4, dh.shape).astype(np.uint8)
    kwargs = dict(bands=bands, codes=None, n_band_codes=4, n_cells=4, n_patterns=4)
    one = keyed_summary.summarise_keyed(dh, patterns=2, **kwargs)
    grid = keyed_summary.summarise_keyed(dh, patterns=np.full(dh.shape, 2, np.int32), **kwargs)
    assert one is not None and grid is not None
    for c in range(16):
        assert_identical(one[0].union([c]), grid[0].union([c]), f"cell {c}")
    assert one[0].count[8:12].sum() == np.isfinite(dh).sum()  # all in pattern 2's cells
