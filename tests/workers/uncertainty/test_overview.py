"""The standardised dh overview (workers/uncertainty/overview.py)."""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr
import zarr

from demaudit.workers.outputs.layout import ALL_PART
from demaudit.workers.outputs.writers import OverviewLayout, ResultsStore
from demaudit.workers.uncertainty import overview as ov
from demaudit.workers.uncertainty import sample_store as ss
from demaudit.workers.uncertainty.sample import ErrorModelOptions
from demaudit.workers.uncertainty.sigma import SigmaModel

SECTION = {"sigma_model": {"a_m": 0.2, "b_m": 0.5, "c": 1.0, "d_m": 0.3}, "centre_m": 0.1}


def test_a_block_is_its_dh_less_the_centre_over_sigma_at_its_terrain():
    dh = np.array([[0.1, 0.6], [np.nan, -0.4]], np.float32)
    terrain = np.array([[[0.0, 45.0], [10.0, 0.0]], [[0.0, 1.0], [0.5, 2.0]]], np.float32)
    z = ov.standardised_block(dh, terrain, ov.sigma_of(SECTION), 0.1)
    # by hand: sigma = 0.2 + 0.5 tan(slope) + 0.3 |curvature|
    assert z[0, 0] == pytest.approx(0.0, abs=1e-7)  # 0.1 in float32 less 0.1
    assert z[0, 1] == pytest.approx(0.5 / (0.2 + 0.5 * 1.0 + 0.3), rel=1e-5)
    assert np.isnan(z[1, 0])
    assert z[1, 1] == pytest.approx(-0.5 / (0.2 + 0.6), rel=1e-6)
    assert ov.sigma_of(SECTION) == SigmaModel(0.2, 0.5, 1.0, 0.3)


def sample_with(terrain: np.ndarray):
    from dataclasses import replace

    from tests.workers.uncertainty.test_sample_store import tile

    return replace(tile(0), terrain_overview=terrain)


def test_the_overview_is_written_per_tile_on_the_dh_overviews_grid(tmp_path):
    layout = OverviewLayout(
        crs="EPSG:32632",
        transform=(40.0, 0.0, 480000.0, 0.0, -40.0, 6230000.0),
        width=4,
        height=2,
        factor=8,
        tile_block=2,
        offsets={"a": (0, 0), "b": (0, 2)},
    )
    store = ResultsStore(tmp_path, layout)
    rng = np.random.default_rng(0)
    blocks = {k: rng.standard_normal((2, 2)).astype(np.float32) for k in ("a", "b")}
    for k, b in blocks.items():
        store.write_overview(k, b)
    samples = ss.ErrorSampleStore(store.path, mode="a")
    terrain = np.stack([np.full((2, 2), 20.0), np.full((2, 2), 0.4)]).astype(np.float32)
    options = ErrorModelOptions()
    samples.write("a", ALL_PART, sample_with(terrain), options)  # b has no sample: stays NaN
    assert ov.write_standardised_overview(store.path, layout.offsets, SECTION, samples) == 1
    z = np.asarray(zarr.open_array(str(store.path / ov.GROUP / "z"), mode="r")[...])
    expected = (blocks["a"] - 0.1) / (0.2 + 0.5 * np.tan(np.radians(20.0)) + 0.3 * 0.4)
    assert np.allclose(z[:, :2], expected, rtol=1e-5)
    assert np.isnan(z[:, 2:]).all()
    ds = xr.open_zarr(store.path, group=ov.GROUP, consolidated=False)
    dh = xr.open_zarr(store.path, group="dh_overview", consolidated=False)
    assert np.array_equal(ds["x"], dh["x"]) and np.array_equal(ds["y"], dh["y"])
    assert ds["z"].rio.crs == dh["dh"].rio.crs
