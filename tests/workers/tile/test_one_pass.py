"""The one-pass tile summaries against the per-mask path they replace: summarise(dh[mask]) for
the tile, each region and each region x stratum (masks from strata.stratum_masks on the slope of
terrain.slope_degrees). Bins, counts and extremes must be identical, moments equal to rounding."""

from __future__ import annotations

import numpy as np
import pytest

from demaudit.workers.stats import bins
from demaudit.workers.stats import summary as dhs
from demaudit.workers.tile import kernels, keyed_summary
from demaudit.workers.tile import one_pass as tile_pass
from demaudit.workers.tile import task as tile_task
from demaudit.workers.tile.strata import ClassInfo, excluded_mask, stratum_masks
from demaudit.workers.tile.terrain import slope_degrees

CLASSES = (
    ClassInfo(1, "bare", "non_vegetated"),
    ClassInfo(2, "urban", "non_vegetated"),
    ClassInfo(3, "forest", "vegetated"),
    ClassInfo(7, "water", "excluded"),
)
EDGES = (0.0, 5.0, 15.0, 30.0)
PIXEL = (2.0, 3.0)


@pytest.fixture(autouse=True, params=["compiled", "numpy"])
def backend(request: pytest.FixtureRequest, monkeypatch: pytest.MonkeyPatch) -> str:
    """Every test runs on the compiled loops (workers/tile/kernels.py) and on the numpy path."""
    if request.param == "compiled" and not kernels.AVAILABLE:
        pytest.skip("numba is not installed")
    monkeypatch.setattr(kernels, "AVAILABLE", request.param == "compiled")
    return str(request.param)


def per_mask(dh, *, reference, landcover, region_masks, classes, slope_edges, pixel_size_m):
    """The former path: one summarise per mask (the reference implementation)."""
    valid = np.isfinite(dh)
    excluded = excluded_mask(landcover, classes)
    if excluded is not None:
        valid &= ~excluded
    px, py = pixel_size_m
    slope = slope_degrees(reference, pixel_size_x_m=px, pixel_size_y_m=py)
    strata = stratum_masks(
        landcover=landcover, classes=classes, slope=slope, slope_edges=slope_edges
    )
    areas = {tile_pass.ALL: valid} | {k: m & valid for k, m in region_masks.items()}
    return (
        {k: dhs.summarise(dh[m]) for k, m in areas.items()},
        {k: {n: dhs.summarise(dh[m & s]) for n, s in strata.items()} for k, m in areas.items()},
    )


def assert_same(got: dhs.DhSummary, want: dhs.DhSummary, where: str) -> None:
    assert got.count == want.count, where
    assert got.bins.dtype == want.bins.dtype and got.counts.dtype == want.counts.dtype, where
    np.testing.assert_array_equal(got.bins, want.bins, err_msg=where)
    np.testing.assert_array_equal(got.counts, want.counts, err_msg=where)
    assert got.minimum == want.minimum and got.maximum == want.maximum, where
    scale = np.sqrt(want.m2 / want.count) if want.count else 0.0
    assert got.mean == pytest.approx(want.mean, rel=1e-12, abs=1e-12 * scale + 1e-300), where
    assert got.m2 == pytest.approx(want.m2, rel=1e-11, abs=1e-300), where


def scene(seed: int, *, shape=(90, 110), with_landcover=True):
    rng = np.random.default_rng(seed)
    rows, cols = shape
    y, x = np.mgrid[0:rows, 0:cols].astype(np.float64)
    reference = 100 + 0.4 * x + 8 * np.sin(x / 7) * np.cos(y / 5) + rng.normal(0, 0.3, shape)
    reference[rng.random(shape) < 0.01] = np.nan
    dh = rng.normal(0.2, 0.4, shape)
    blunder = rng.random(shape) < 0.03
    dh[blunder] = rng.uniform(-60, 60, blunder.sum())
    dh.ravel()[:6] = [2.0, -2.0, np.nextafter(2.0, 0), np.nextafter(-2.0, 0), 1e7, -2.5e5]
    dh[rng.random(shape) < 0.05] = np.nan
    dh[reference != reference] = np.nan
    landcover = None
    if with_landcover:
        landcover = rng.choice([1.0, 2.0, 3.0, 7.0, 9.0, np.nan], size=shape)
    masks = {
        "west": x < cols * 0.6,
        "north": y < rows * 0.5,  # overlaps west
        "ring": (np.hypot(x - 50, y - 40) < 30) & (np.hypot(x - 50, y - 40) > 10),
        "outside": np.zeros(shape, dtype=bool),
    }
    return dh, reference, landcover, masks


@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("with_landcover", [True, False])
@pytest.mark.parametrize("n_regions", [0, 2, 4])  # keys on the grid (up to 3), or renumbered
def test_one_pass_equals_one_summarise_per_mask(
    seed: int, with_landcover: bool, n_regions: int
) -> None:
    dh, reference, landcover, masks = scene(seed, with_landcover=with_landcover)
    masks = dict(list(masks.items())[:n_regions])  # the first two overlap
    got = summarised_as_per_mask(dh, reference, landcover, masks)
    if with_landcover:
        valid = np.isfinite(dh)
        assert got.excluded == int(np.count_nonzero(valid & (landcover == 7)))
        assert got.excluded > 0
    else:
        assert got.excluded == 0
    if "outside" in masks:
        assert got.areas["outside"].count == 0


def test_counters_in_groups_give_the_same_summaries(monkeypatch: pytest.MonkeyPatch) -> None:
    dh, reference, landcover, masks = scene(5)
    kwargs = pass_arguments(reference, landcover, masks)
    whole = tile_pass.summarise_pixels(dh, **kwargs)
    monkeypatch.setattr(keyed_summary, "MAX_COUNTERS", 3 * keyed_summary._WIDTH)
    grouped = tile_pass.summarise_pixels(dh, **kwargs)
    for area in whole.strata:
        for name, want in whole.strata[area].items():
            assert_same(grouped.strata[area][name], want, f"{area} {name}")


def test_no_valid_pixel_gives_empty_summaries() -> None:
    dh, reference, landcover, masks = scene(3)
    got = tile_pass.summarise_pixels(
        np.full(dh.shape, np.nan), **pass_arguments(reference, landcover, masks)
    )
    assert all(s.count == 0 for s in got.areas.values())
    assert all(s.count == 0 for by in got.strata.values() for s in by.values())
    assert got.excluded == 0


def test_cells_union_equals_summarise_of_the_union() -> None:
    rng = np.random.default_rng(11)
    x = np.concatenate([rng.normal(-0.3, 0.2, 5000), rng.uniform(-80, 80, 300), [3.0, -2.0]])
    cells = rng.integers(0, 6, x.size)
    per_cell = keyed_summary.summarise_cells(x, cells, 8)  # cells 6 and 7 stay empty
    for chosen in ([0], [1, 4], [0, 1, 2, 3, 4, 5], [6], [6, 7, 2]):
        assert_same(per_cell.union(chosen), dhs.summarise(x[np.isin(cells, chosen)]), str(chosen))


def test_membership_patterns_number_only_what_occurs() -> None:
    a = np.array([True, True, False, False, True])
    b = np.array([False, True, False, False, True])
    pattern, members = tile_pass.membership_patterns(np.arange(5), {"a": a, "b": b})
    assert sorted(members, key=sorted) == [frozenset(), {"a"}, {"a", "b"}]
    assert [members[p] for p in pattern] == [{"a"}, {"a", "b"}, set(), set(), {"a", "b"}]


def test_many_overlapping_regions_take_several_rounds() -> None:
    rng = np.random.default_rng(8)
    masks = {f"r{i}": rng.random((30, 40)) < 0.3 for i in range(37)}
    flat = np.flatnonzero(rng.random(30 * 40) < 0.9)
    pattern, members = tile_pass.membership_patterns(flat, masks)
    for i, at in enumerate(flat):
        assert members[pattern[i]] == {k for k, m in masks.items() if m.ravel()[at]}
    assert len(set(members)) == len(members)


def former_bin_index(x: np.ndarray) -> np.ndarray:
    """The bin index as first written (the reference for the faster one)."""
    k = np.empty(x.shape, dtype=np.int64)
    linear = np.abs(x) < bins.LINEAR_LIMIT_M
    k[linear] = np.floor(x[linear] / bins.LINEAR_WIDTH_M)
    pos = x >= bins.LINEAR_LIMIT_M
    k[pos] = bins.K_LIMIT + np.floor(np.log(x[pos] / bins.LINEAR_LIMIT_M) / bins.LOG_RATIO)
    neg = x <= -bins.LINEAR_LIMIT_M
    k[neg] = -bins.K_LIMIT - 1 - np.floor(np.log(-x[neg] / bins.LINEAR_LIMIT_M) / bins.LOG_RATIO)
    return k


def test_bin_index_is_the_former_one() -> None:
    rng = np.random.default_rng(4)
    edges = np.arange(-10_005, 10_005) * bins.LINEAR_WIDTH_M
    x = np.concatenate(
        [
            rng.normal(0, 1, 100_000),
            rng.uniform(-1e4, 1e4, 10_000),
            edges,
            np.nextafter(edges, np.inf),
            np.nextafter(edges, -np.inf),
            [2.0, -2.0, np.nextafter(2.0, 0), np.nextafter(-2.0, 0), 1e300, -1e300, 0.0, -0.0],
        ]
    )
    np.testing.assert_array_equal(bins.bin_index(x), former_bin_index(x))
    grid = x[:10_000].reshape(100, 100)
    np.testing.assert_array_equal(bins.bin_index(grid), former_bin_index(grid))


def test_tile_task_and_tile_pass_name_the_whole_tile_alike() -> None:
    assert tile_task.ALL == tile_pass.ALL


def former_merged_histogram(parts: list[dhs.DhSummary]) -> tuple[np.ndarray, np.ndarray]:
    """merge_all's histogram as first written: one sort of all bins."""
    all_bins = np.concatenate([s.bins for s in parts]).astype(np.int64)
    all_counts = np.concatenate([s.counts for s in parts]).astype(np.int64)
    order = np.argsort(all_bins, kind="stable")
    sorted_bins = all_bins[order]
    starts = np.flatnonzero(np.r_[True, sorted_bins[1:] != sorted_bins[:-1]])
    return sorted_bins[starts], np.add.reduceat(all_counts[order], starts)


@pytest.mark.parametrize("tiles", [2, 40])
def test_merge_all_histograms_are_the_former_ones(tiles: int) -> None:
    rng = np.random.default_rng(tiles)
    parts = []
    for _ in range(tiles):
        x = rng.normal(rng.uniform(-3, 3), rng.uniform(0.01, 2), int(rng.integers(1, 20_000)))
        x[rng.random(x.size) < 0.02] *= 40
        parts.append(dhs.summarise(x))
    merged = dhs.merge_all(parts)
    bins, counts = former_merged_histogram(parts)
    assert merged.bins.dtype == np.int64 and merged.counts.dtype == np.int64
    np.testing.assert_array_equal(merged.bins, bins)
    np.testing.assert_array_equal(merged.counts, counts)


def test_cells_leave_out_nan_infinite_and_negative_cells() -> None:
    rng = np.random.default_rng(12)
    x = rng.normal(0.1, 0.5, 3000)
    x[::17] = np.nan
    x[5::31] = np.inf
    x[7::29] = -np.inf
    cells = rng.integers(-1, 3, x.size)  # -1: left out (an excluded pixel)
    per_cell = keyed_summary.summarise_cells(x, cells.astype(np.int32), 3)
    for c in range(3):
        assert_same(per_cell.union([c]), dhs.summarise(x[cells == c]), str(c))


def test_loops_compile_without_a_cache_folder(monkeypatch: pytest.MonkeyPatch) -> None:
    numba = pytest.importorskip("numba")
    real = numba.njit

    def no_cache_folder(*args: object, cache: bool = False, **kwargs: object):  # type: ignore[no-untyped-def]
        if cache:  # what numba says when no cache locator is available (read-only install)
            raise RuntimeError("cannot cache function: no locator available")
        return real(*args, **kwargs)

    monkeypatch.setattr(numba, "njit", no_cache_folder)
    monkeypatch.setattr(kernels, "_COMPILED", {})
    x = np.array([0.1, 5.0, np.nan, -0.3])
    per_cell = keyed_summary.summarise_cells(x, np.array([0, 0, 0, 1]), 2)
    assert_same(per_cell.union([0]), dhs.summarise(x[:3]), "cell 0")


def test_a_region_holding_every_valid_pixel_shares_the_tiles_summaries() -> None:
    dh, reference, landcover, _ = scene(6)
    valid = np.isfinite(dh)
    almost = valid.copy()
    almost[np.unravel_index(np.flatnonzero(valid)[17], dh.shape)] = False  # one valid pixel out
    masks = {"whole": np.ones(dh.shape, dtype=bool), "valid": valid, "almost": almost}
    got = summarised_as_per_mask(dh, reference, landcover, masks)
    tile = got.areas[tile_pass.ALL]
    # "valid" differs from the tile only where dh is NaN: it holds the same pixels
    for area in ("whole", "valid"):
        assert got.areas[area] is tile
        assert all(got.strata[area][k] is s for k, s in got.strata[tile_pass.ALL].items())
    assert got.areas["almost"] is not tile and got.areas["almost"].count == tile.count - 1


def test_a_tile_inside_or_outside_each_region_has_one_pattern_and_the_same_summaries() -> None:
    dh, reference, landcover, _ = scene(9)
    masks = {
        "inside": np.ones(dh.shape, dtype=bool),
        "outside": np.zeros(dh.shape, dtype=bool),
        "also": np.ones(dh.shape, dtype=bool),
    }
    patterns, members = tile_pass.grid_patterns(masks)
    assert patterns == 0b101 and members[patterns] == {"inside", "also"}
    summarised_as_per_mask(dh, reference, landcover, masks)


def pass_arguments(reference, landcover, masks) -> dict:
    """The keyword arguments of summarise_pixels (and per_mask) for a scene."""
    return dict(
        reference=reference,
        landcover=landcover,
        region_masks=masks,
        classes=CLASSES,
        slope_edges=EDGES,
        pixel_size_m=PIXEL,
    )


def summarised_as_per_mask(dh, reference, landcover, masks) -> tile_pass.TileSummaries:
    """summarise_pixels of the scene, asserted equal to one summarise per mask (per_mask)."""
    kwargs = pass_arguments(reference, landcover, masks)
    got = tile_pass.summarise_pixels(dh, **kwargs)
    want_areas, want_strata = per_mask(dh, **kwargs)
    assert list(got.areas) == list(want_areas)
    for area, want in want_areas.items():
        assert_same(got.areas[area], want, area)
        assert list(got.strata[area]) == list(want_strata[area])
        for name, want_s in want_strata[area].items():
            assert_same(got.strata[area][name], want_s, f"{area} {name}")
    return got
