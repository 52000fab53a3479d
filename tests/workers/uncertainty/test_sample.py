"""A tile's error-model contribution (workers/uncertainty/sample.py)."""

from __future__ import annotations

import numpy as np

from demaudit.workers.tile.strata import ClassInfo
from demaudit.workers.uncertainty import sample as em

PIXEL = 5.0


def test_tile_sample_bins_stable_pixels_by_slope_and_samples_reproducibly():
    rng = np.random.default_rng(3)
    n = 200
    x = np.arange(n) * PIXEL
    reference = np.tile(0.2 * x, (n, 1))  # a plane of slope atan(0.2) = 11.3 degrees
    dh = rng.standard_normal((n, n)) * 0.4
    dh[0, 0] = 80.0  # a blunder: beyond the tile's outlier limit
    landcover = np.where(np.arange(n)[:, None] < 100, 1.0, 2.0) * np.ones((n, n))
    classes = (ClassInfo(1, "open", "non_vegetated"), ClassInfo(2, "forest", "vegetated"))
    opts = em.ErrorModelOptions(seed=5, samples_per_tile=500)

    def sample(tile_id: str) -> em.TileErrorSample:
        return em.tile_error_sample(
            dh,
            reference=reference,
            landcover=landcover,
            classes=classes,
            region_masks={"A": np.ones((n, n), bool)},
            pixel_centres=lambda r, c: ((c + 0.5) * PIXEL, (r + 0.5) * PIXEL),
            crs="EPSG:32632",
            pixel_size_m=(PIXEL, PIXEL),
            tile_id=tile_id,
            options=opts,
        )

    s = sample("t1")
    assert s.stable == 100 * n - 1 and s.outside_limits == 1
    assert list(s.slope_bins) == [5]  # 10-12 degrees
    assert s.slope_bins[5].count == s.stable
    assert len(s.x) == 500 and np.all(s.y < 100 * PIXEL)  # open ground is the top half
    assert s.counts["*"].sum() == n * n and s.counts["A"].sum() == n * n
    again = sample("t1")
    assert np.array_equal(s.x, again.x) and np.array_equal(s.priority, again.priority)
    assert not np.array_equal(s.x, sample("t2").x)


def test_curvature_of_a_paraboloid():
    # z = x^2 + 2 y^2 has z_xx + z_yy = 2 + 4 = 6 everywhere (exact for the 3 x 3 stencil), so
    # |curvature| x 100 = 600, the outer ring included (copied from inside)
    y, x = np.indices((20, 20)) * 1.0
    para = x**2 + 2 * y**2
    assert np.allclose(em.abs_curvature(para, px=1.0, py=1.0), 600.0)
    # a NaN height leaves its 3 x 3 neighbourhood without curvature
    para[10, 10] = np.nan
    curvature = em.abs_curvature(para, px=1.0, py=1.0)
    assert np.isnan(curvature[9:12, 10]).all() and np.isnan(curvature[10, 9:12]).all()
