"""The client-side merge of tile samples (workers/uncertainty/accumulate.py)."""

from __future__ import annotations

import numpy as np

from demaudit.workers.tile.strata import ClassInfo
from demaudit.workers.uncertainty import accumulate, sample

PIXEL = 5.0


def test_accumulator_keeps_the_same_points_in_any_order():
    def fake(i: int) -> sample.TileErrorSample:
        rng = np.random.default_rng(i)
        k = 300
        return sample.TileErrorSample(
            crs="EPSG:32632",
            pixel_area_m2=25.0,
            slope_bins={},
            curvature_bins={},
            joint_bins={},
            joint_sums=np.zeros((2, 36 * 7)),
            x=rng.random(k),
            y=rng.random(k),
            dh=rng.random(k),
            slope_deg=rng.random(k),
            curvature=rng.random(k),
            priority=rng.random(k),
            counts={"*": np.ones((1, sample.DEGREE_BINS, sample.CURVATURE_KEYS), np.int64)},
        )

    forward, backward = (
        accumulate.ErrorModelAccumulator(max_points=1000),
        accumulate.ErrorModelAccumulator(max_points=1000),
    )
    for i in range(20):
        forward.add(fake(i))
        backward.add(fake(19 - i))
        assert sum(len(p) for p in forward.points.values()) <= 2000  # bounded as tiles arrive
    a, b = forward.samples(), backward.samples()
    assert len(a) == 1000
    assert np.array_equal(a[np.lexsort(a.T)], b[np.lexsort(b.T)])
    assert forward.counts["*"].sum() == 20 * sample.DEGREE_BINS * sample.CURVATURE_KEYS


def test_the_samples_come_in_one_order_whatever_order_the_tiles_came_in():
    def fake(i: int) -> sample.TileErrorSample:
        rng = np.random.default_rng(i)
        k = 50
        return sample.TileErrorSample(
            crs="EPSG:32632",
            pixel_area_m2=25.0,
            slope_bins={},
            curvature_bins={},
            joint_bins={},
            joint_sums=np.zeros((2, sample.N_SLOPE * sample.N_CURVATURE)),
            x=rng.random(k),
            y=rng.random(k),
            dh=rng.random(k),
            slope_deg=rng.random(k),
            curvature=rng.random(k),
            priority=rng.random(k),
            counts={},
        )

    # fewer points than max_points: nothing is trimmed, and still one order (the variogram
    # draws subsets in it, so the fitted model must not depend on which tile finished first)
    forward = accumulate.ErrorModelAccumulator(max_points=10_000)
    backward = accumulate.ErrorModelAccumulator(max_points=10_000)
    for i in range(6):
        forward.add(fake(i))
        backward.add(fake(5 - i))
    a, b = forward.samples(), backward.samples()
    assert len(a) == 300 and np.array_equal(a, b)


def test_only_tiles_that_added_a_sample_are_counted():
    """A tile whose valid pixels are all vegetated adds its pixel counts but no sample: the
    error model's ``tiles`` counts the tiles its samples came from."""
    n = 40
    reference = np.tile(0.1 * np.arange(n) * PIXEL, (n, 1))
    dh = np.random.default_rng(1).standard_normal((n, n)) * 0.3
    classes = (ClassInfo(1, "open", "non_vegetated"), ClassInfo(2, "forest", "vegetated"))

    def tile(tile_id: str, cover: float) -> sample.TileErrorSample:
        return sample.tile_error_sample(
            dh,
            reference=reference,
            landcover=np.full((n, n), cover),
            classes=classes,
            region_masks={},
            pixel_centres=lambda r, c: ((c + 0.5) * PIXEL, (r + 0.5) * PIXEL),
            crs="EPSG:32632",
            pixel_size_m=(PIXEL, PIXEL),
            tile_id=tile_id,
            options=sample.ErrorModelOptions(samples_per_tile=100),
        )

    forest, open_ground = tile("forest", 2.0), tile("open", 1.0)
    assert forest.stable == 0 and len(forest.dh) == 0 and forest.counts["*"].sum() == n * n
    assert len(open_ground.dh) == 100
    acc = accumulate.ErrorModelAccumulator()
    for s in (forest, open_ground, None):
        acc.add(s)
    assert acc.tiles == 1
    assert acc.stable == open_ground.stable
    assert acc.counts["*"].sum() == 2 * n * n  # the forest tile's pixels still count
