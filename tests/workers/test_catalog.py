"""The catalog's scan: rasters that cannot be elevation (or land cover) are refused with the
reason; integer single-band DEMs and palette land cover are accepted."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import rasterio
from rasterio.enums import ColorInterp
from rasterio.transform import from_origin

from workers.catalog import ScanFailure, TileInfo, scan_landcover_tile, scan_tile

UTM32 = "EPSG:32632"


def _raster(
    path: Path,
    *,
    bands: int = 1,
    dtype: str = "uint8",
    colorinterp: list[ColorInterp] | None = None,
    colormap: bool = False,
) -> Path:
    profile = {
        "driver": "GTiff",
        "height": 8,
        "width": 8,
        "count": bands,
        "dtype": dtype,
        "crs": UTM32,
        "transform": from_origin(500_000, 6_000_000, 5.0, 5.0),
    }
    if bands == 3 and colorinterp is not None:
        profile["photometric"] = "RGB"
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(np.full((bands, 8, 8), 7).astype(dtype))
        if colorinterp is not None:
            dst.colorinterp = colorinterp
        if colormap:
            dst.write_colormap(1, {0: (0, 0, 0, 255), 7: (0, 128, 0, 255)})
    return path


def test_an_rgb_orthophoto_is_not_a_dem(tmp_path: Path):
    rgb = [ColorInterp.red, ColorInterp.green, ColorInterp.blue]
    found = scan_tile(_raster(tmp_path / "ortho.tif", bands=3, colorinterp=rgb))
    assert isinstance(found, ScanFailure)
    assert found.reason == (
        "tile ortho.tif holds 3 bands (red, green, blue) of uint8: not an elevation model, "
        "which has one band; it was not used"
    )


def test_several_bands_without_colours_are_not_a_dem(tmp_path: Path):
    found = scan_tile(_raster(tmp_path / "two.tif", bands=2, dtype="float32"))
    assert isinstance(found, ScanFailure) and "2 bands" in found.reason


def test_a_palette_raster_is_not_a_dem_but_may_be_land_cover(tmp_path: Path):
    path = _raster(tmp_path / "classes.tif", colormap=True)
    found = scan_tile(path)
    assert isinstance(found, ScanFailure) and "palette" in found.reason
    assert isinstance(scan_landcover_tile(path), TileInfo)


def test_a_single_red_band_is_an_image(tmp_path: Path):
    found = scan_tile(_raster(tmp_path / "red.tif", colorinterp=[ColorInterp.red]))
    assert isinstance(found, ScanFailure) and "(an image)" in found.reason


@pytest.mark.parametrize("dtype", ["uint8", "int16", "uint16", "float32"])
def test_single_band_integer_and_float_dems_are_accepted(tmp_path: Path, dtype: str):
    found = scan_tile(_raster(tmp_path / "dem.tif", dtype=dtype))
    assert isinstance(found, TileInfo) and found.dtype == dtype


def test_a_multiband_land_cover_is_refused(tmp_path: Path):
    rgb = [ColorInterp.red, ColorInterp.green, ColorInterp.blue]
    found = scan_landcover_tile(_raster(tmp_path / "map.tif", bands=3, colorinterp=rgb))
    assert isinstance(found, ScanFailure) and "not a land-cover raster" in found.reason
