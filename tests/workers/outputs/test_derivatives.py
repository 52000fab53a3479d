"""The job's derived-comparison outputs: overviews in results.zarr, tile entries, the section."""

from __future__ import annotations

import numpy as np
import rioxarray  # noqa: F401
import xarray as xr
import zarr
from pyproj import CRS

from demaudit.workers.outputs.derivatives import GROUP, JobDerivatives
from demaudit.workers.outputs.writers import OverviewLayout
from demaudit.workers.tile.derivative_pass import DerivativeOptions
from demaudit.workers.tile.derivatives import SLOPE
from demaudit.workers.tile.task import OK, TileResult
from tests.workers.tile.test_derivative_pass import compare, terrain

LAYOUT = OverviewLayout(
    crs=CRS.from_epsg(32632).to_wkt(),
    transform=(40.0, 0.0, 480_000.0, 0.0, -40.0, 6_230_000.0),
    width=18,
    height=8,
    factor=8,
    tile_block=8,
    offsets={"a": (0, 0), "b": (0, 9)},
)


def test_overviews_entries_and_section(tmp_path) -> None:
    store = tmp_path / "results.zarr"
    zarr.open_group(str(store), mode="w", zarr_format=3)
    job = JobDerivatives.start(
        DerivativeOptions(), region_ids=["north"], store_path=store, layout=LAYOUT
    )
    assert job is not None
    found = {tile: compare(*terrain(seed)) for seed, tile in enumerate(("a", "b"))}
    extras = [job.add(TileResult(t, OK, None, derivatives=f)) for t, f in found.items()]
    assert job.add(TileResult("c", "failed", "unreadable")) == {}
    assert extras[0]["derivatives"][SLOPE]["count"] > 0
    document: dict = {"cautions": []}
    job.attach(document, {"north": "North"})
    assert document["derivatives"]["tiles"] == 2
    assert any("3 x 3 window" in c for c in document["cautions"])
    overview = xr.open_zarr(store, group=GROUP, decode_coords="all", consolidated=False)
    assert overview[SLOPE].rio.crs.to_epsg() == 32632
    values = overview[SLOPE].values
    # tile a's 60 x 70 pixels in 8 x 8 blocks fill 8 x 9 cells from (0, 0); b from column 9
    np.testing.assert_array_equal(values[:, :9], found["a"].overviews[SLOPE])
    np.testing.assert_array_equal(values[:, 9:], found["b"].overviews[SLOPE])


def test_nothing_without_derivatives_or_overview_grid(tmp_path) -> None:
    assert JobDerivatives.start(None, region_ids=[], store_path=tmp_path, layout=LAYOUT) is None
    job = JobDerivatives.start(
        DerivativeOptions(), region_ids=[], store_path=tmp_path / "s.zarr", layout=None
    )
    assert job is not None
    job.add(TileResult("a", OK, None, derivatives=compare(*terrain(1))))
    assert not (tmp_path / "s.zarr" / GROUP).exists()
