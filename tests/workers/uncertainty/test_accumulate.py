"""The client-side merge of tile samples (workers/uncertainty/accumulate.py)."""

from __future__ import annotations

import numpy as np

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
