"""Tile samples kept in results.zarr and carried into a re-check
(workers/uncertainty/sample_store.py)."""

from __future__ import annotations

import numpy as np
import pytest
import zarr

from demaudit.workers.outputs.layout import ALL_PART
from demaudit.workers.tile.strata import ClassInfo
from demaudit.workers.uncertainty import sample_store as ss
from demaudit.workers.uncertainty.accumulate import ErrorModelAccumulator
from demaudit.workers.uncertainty.model import fit_error_model
from demaudit.workers.uncertainty.sample import (
    ErrorModelOptions,
    TileErrorSample,
    tile_error_sample,
)

PIXEL = 5.0
N = 120
OPTIONS = ErrorModelOptions(seed=3, samples_per_tile=400)
CLASSES = (ClassInfo(1, "open", "non_vegetated"), ClassInfo(2, "forest", "vegetated"))


def tile(i: int) -> TileErrorSample:
    rng = np.random.default_rng(i)
    x = (np.arange(N) + 0.5) * PIXEL
    reference = 30 * np.sin(x / 90.0)[None, :] + 20 * np.cos(x / 60.0)[:, None]
    dh = (0.2 + 0.02 * np.abs(reference - reference.mean())) * rng.standard_normal((N, N))
    landcover = np.where(rng.random((N, N)) < 0.8, 1.0, 2.0)
    return tile_error_sample(
        dh,
        reference=reference,
        landcover=landcover,
        classes=CLASSES,
        region_masks={"A": np.arange(N)[None, :] * np.ones((N, 1)) < N / 2},
        pixel_centres=lambda r, c: ((c + 0.5) * PIXEL + i * N * PIXEL, (r + 0.5) * PIXEL),
        crs="EPSG:32632",
        pixel_size_m=(PIXEL, PIXEL),
        tile_id=f"t{i}",
        options=OPTIONS,
    )


def same(a: TileErrorSample, b: TileErrorSample) -> None:
    for name in ("x", "y", "dh", "slope_deg", "curvature", "priority", "joint_sums"):
        assert np.array_equal(getattr(a, name), getattr(b, name)), name
    for name in ("crs", "pixel_area_m2", "stable", "outside_limits"):
        assert getattr(a, name) == getattr(b, name)
    for kind in ("slope_bins", "curvature_bins", "joint_bins"):
        mine, theirs = getattr(a, kind), getattr(b, kind)
        assert sorted(mine) == sorted(theirs)
        for k in mine:
            assert mine[k].count == theirs[k].count and mine[k].m2 == theirs[k].m2
            assert np.array_equal(mine[k].bins, theirs[k].bins)
            assert np.array_equal(mine[k].counts, theirs[k].counts)
    assert list(a.counts) == list(b.counts)
    assert all(np.array_equal(a.counts[k], b.counts[k]) for k in a.counts)
    assert a.terrain_overview is not None and b.terrain_overview is not None
    assert np.array_equal(a.terrain_overview, b.terrain_overview, equal_nan=True)


def assert_close(a: object, b: object, path: str = "") -> None:
    """Nested documents equal, floats within 1e-6 relative (the fits amplify the last-bit
    differences of sums taken in another order)."""
    if isinstance(a, dict) and isinstance(b, dict):
        assert sorted(a) == sorted(b), path
        for k in a:
            assert_close(a[k], b[k], f"{path}.{k}")
    elif isinstance(a, list) and isinstance(b, list):
        assert len(a) == len(b), path
        for i, (x, y) in enumerate(zip(a, b, strict=True)):
            assert_close(x, y, f"{path}[{i}]")
    elif isinstance(a, float) and isinstance(b, float):
        assert a == pytest.approx(b, rel=1e-6, abs=1e-12, nan_ok=True), path
    else:
        assert a == b, path


def test_a_sample_reads_back_as_written_and_only_under_its_options(tmp_path):
    zarr.open_group(str(tmp_path / "r.zarr"), mode="w", zarr_format=3)
    store = ss.ErrorSampleStore(tmp_path / "r.zarr", mode="a")
    written = tile(1)
    store.write("t1", ALL_PART, written, OPTIONS)
    same(store.read("t1", ALL_PART), written)
    assert store.parts("t1") == [ALL_PART]
    assert store.reusable("t1", OPTIONS)
    assert not store.reusable("t1", ErrorModelOptions(seed=4, samples_per_tile=400))
    assert not store.reusable("t2", OPTIONS)
    assert ss.not_reusable(tmp_path / "r.zarr", ["t1", "t2"], OPTIONS) == ["t2"]
    assert ss.not_reusable(tmp_path / "none.zarr", ["t1"], OPTIONS) == ["t1"]


def test_carried_samples_give_the_fresh_runs_model(tmp_path):
    samples = {f"t{i}": tile(i) for i in range(4)}
    for path in ("base.zarr", "night.zarr"):
        zarr.open_group(str(tmp_path / path), mode="w", zarr_format=3)
    base = ss.ErrorSampleStore(tmp_path / "base.zarr", mode="a")
    fresh = [ErrorModelAccumulator(max_points=1000), ErrorModelAccumulator(max_points=1000)]
    for tile_id, s in samples.items():
        ss.record_samples(base, tile_id, (s, None), fresh, OPTIONS)
    # a re-check: t0 and t2 kept (carried from the baseline), t1 and t3 recomputed
    night = ss.ErrorSampleStore(tmp_path / "night.zarr", mode="a")
    recheck = [ErrorModelAccumulator(max_points=1000), ErrorModelAccumulator(max_points=1000)]
    ss.carry_samples(night, tmp_path / "base.zarr", ["t0", "t2"], recheck)
    for tile_id in ("t3", "t1"):
        ss.record_samples(night, tile_id, (samples[tile_id], None), recheck, OPTIONS)
    assert recheck[1].tiles == 0 and recheck[0].tiles == 4
    a = fit_error_model(fresh[0], max_distance_m=1000.0, seed=0).document()
    b = fit_error_model(recheck[0], max_distance_m=1000.0, seed=0).document()
    # equal up to the rounding of sums taken in another order
    assert_close(a, b)
    assert night.reusable("t0", OPTIONS) and night.reusable("t3", OPTIONS)
