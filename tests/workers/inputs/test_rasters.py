"""Reading tiles: nodata handling and the refusal of values no terrain has (void codes)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from rasterio.transform import from_origin

from demaudit.workers.errors import ImplausibleHeightsError, TileReadError
from demaudit.workers.inputs.catalog import scan_tile
from demaudit.workers.inputs.rasters import implausible_heights, read_mosaic, read_tile

UTM32 = "EPSG:32632"


def _terrain(shape: tuple[int, int] = (20, 20)) -> np.ndarray:
    rows, cols = np.mgrid[0 : shape[0], 0 : shape[1]]
    return 120.0 + 0.5 * rows + 0.25 * cols


@pytest.mark.parametrize("code", [-9999.0, -32767.0, -3.4028234663852886e38, 32767.0, np.inf])
def test_a_void_code_among_heights_is_found(code: float):
    data = _terrain()
    data[:3, :] = code
    found = implausible_heights(data)
    assert found is not None
    assert found.value == code and found.count == 60 and found.valid == 400


def test_a_single_void_code_pixel_is_found():
    data = _terrain()
    data[5, 5] = -9999.0
    found = implausible_heights(data)
    assert found is not None and found.count == 1 and "void" in found.why


def test_an_isolated_repeated_extreme_is_a_void_code():
    # -5000 is a plausible depth, but two pixels alone 5,120 m below all others are not terrain
    data = _terrain()
    data[0, :2] = -5000.0
    found = implausible_heights(data)
    assert found is not None and found.value == -5000.0 and "away from every other" in found.why


@pytest.mark.parametrize(
    "edit",
    [
        lambda d: d,  # smooth terrain
        lambda d: np.where(d < 125, 0.0, d),  # sea clamped to 0 next to land (many pixels at 0)
        lambda d: np.full_like(d, 12.0),  # a flat lake: one value only
        lambda d: d - 10_500.0,  # a deep trench, still terrain
        lambda d: np.where(d > 128, np.nan, d),  # voids already NaN
        lambda d: np.concatenate([d[:, :10], d[:, 10:] + 600.0], axis=1),  # a 600 m cliff
    ],
)
def test_terrain_passes(edit):
    assert implausible_heights(edit(_terrain())) is None


def test_the_range_is_checked_in_metres():
    # 9,000 m is the top of the plausible range: 25,000 ft (7,620 m) passes, 25,000 m does not
    data = _terrain() + 25_000.0
    assert implausible_heights(data, metres_per_unit=0.3048) is None  # international foot
    assert implausible_heights(data) is not None


def _tif(path: Path, data: np.ndarray, *, nodata=None, dtype="float32", origin=(500_000, 6e6)):
    import rasterio

    profile = {
        "driver": "GTiff",
        "height": data.shape[0],
        "width": data.shape[1],
        "count": 1,
        "dtype": dtype,
        "crs": UTM32,
        "transform": from_origin(origin[0], origin[1], 5.0, 5.0),
        "nodata": nodata,
    }
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(data.astype(dtype), 1)
    return path


def test_read_tile_refuses_untagged_voids_and_names_the_fix(tmp_path: Path):
    data = _terrain()
    data[:5, :] = -9999.0
    tile = scan_tile(_tif(tmp_path / "t1.tif", data))
    with pytest.raises(ImplausibleHeightsError) as err:
        read_tile(tile, units="metre")
    message = str(err.value)
    assert "test tile t1" in message and "-9999" in message
    assert "100 of 400 pixels (25.0%)" in message
    assert "'test: {nodata: -9999}'" in message
    assert isinstance(err.value, TileReadError)


def test_the_spec_nodata_makes_the_code_a_void(tmp_path: Path):
    data = _terrain()
    data[:5, :] = -9999.0
    tile = scan_tile(_tif(tmp_path / "t1.tif", data))
    heights = read_tile(tile, nodata=-9999.0, units="metre")
    assert np.isnan(heights[:5]).all() and np.isfinite(heights[5:]).all()


def test_the_spec_nodata_also_applies_when_the_tile_tags_another(tmp_path: Path):
    data = _terrain()
    data[0, :] = -9999.0
    data[1, :] = -32767.0
    tile = scan_tile(_tif(tmp_path / "t1.tif", data, nodata=-9999.0))
    with pytest.raises(ImplausibleHeightsError, match="-32767"):
        read_tile(tile, units="metre")
    heights = read_tile(tile, nodata=-32767.0, units="metre")
    assert np.isnan(heights[:2]).all() and np.isfinite(heights[2:]).all()


def test_float32_lowest_as_printed_matches(tmp_path: Path):
    data = _terrain()
    data[:2, :] = np.finfo(np.float32).min
    tile = scan_tile(_tif(tmp_path / "t1.tif", data))
    with pytest.raises(ImplausibleHeightsError) as err:
        read_tile(tile, units="metre")
    printed = str(err.value).split("nodata: ")[1].split("}")[0]
    assert np.isnan(read_tile(tile, nodata=float(printed), units="metre")[:2]).all()


def test_int16_code_is_refused(tmp_path: Path):
    data = _terrain().round()
    data[-1, :] = -32767
    tile = scan_tile(_tif(tmp_path / "t1.tif", data, dtype="int16"))
    with pytest.raises(ImplausibleHeightsError, match="-32767"):
        read_tile(tile, units="metre")


def test_no_check_without_units(tmp_path: Path):
    data = _terrain()
    data[0, 0] = -9999.0
    tile = scan_tile(_tif(tmp_path / "t1.tif", data))
    assert read_tile(tile, units=None)[0, 0] == -9999.0


def test_mosaic_names_the_reference_tile(tmp_path: Path):
    good = _terrain()
    bad = _terrain()
    bad[:, :4] = -9999.0
    tiles = [
        scan_tile(_tif(tmp_path / "r_a.tif", good)),
        scan_tile(_tif(tmp_path / "r_b.tif", bad, origin=(500_100, 6e6))),
    ]
    bounds = (500_000.0, 6e6 - 100, 500_200.0, 6e6)
    with pytest.raises(ImplausibleHeightsError, match="reference tile r_b: 80 of 400"):
        read_mosaic(tiles, bounds, units="metre", margin_px=0)
    mosaic, _ = read_mosaic(tiles, bounds, units="metre", nodata=-9999.0, margin_px=0)
    assert np.count_nonzero(np.isnan(mosaic)) == 80
    raw, _ = read_mosaic(tiles, bounds, units=None, margin_px=0)  # land cover: not checked
    assert np.count_nonzero(raw == -9999.0) == 80


@pytest.mark.parametrize(("dtype", "keep_float32"), [("float32", True), ("float64", False)])
def test_the_first_tile_of_a_mosaic_is_checked_and_voided_as_read(
    tmp_path: Path, dtype: str, keep_float32: bool
):
    # the first tile is voided and checked on its own block, then copied into the mosaic:
    # the same values, margins, counts and refusal as for a tile pasted later
    data = _terrain()
    data[:, :4] = -9999.0
    tiles = [scan_tile(_tif(tmp_path / "r_a.tif", data, dtype=dtype))]
    bounds = (500_000.0, 6e6 - 100, 500_100.0, 6e6)
    with pytest.raises(ImplausibleHeightsError, match="reference tile r_a: 80 of 400"):
        read_mosaic(tiles, bounds, units="metre", keep_float32=keep_float32)
    mosaic, _ = read_mosaic(tiles, bounds, units="metre", nodata=-9999.0, keep_float32=keep_float32)
    assert mosaic.dtype == np.dtype(dtype) and mosaic.shape == (26, 26)  # a 3 px margin
    expected = np.full((26, 26), np.nan)
    expected[3:-3, 3:-3] = np.where(data == -9999.0, np.nan, data.astype(dtype))
    np.testing.assert_array_equal(mosaic, expected)
