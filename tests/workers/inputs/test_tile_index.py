"""The spatial index of tiles (demaudit.workers.inputs.tile_index)."""

from __future__ import annotations

from pyproj import CRS, Transformer
from shapely import box

from demaudit.workers.inputs.catalog import TileInfo
from demaudit.workers.inputs.tile_index import TileIndex, same_crs
from demaudit.workers.tile.grid import Grid

UTM = CRS.from_epsg(32632).to_wkt()
LAEA = CRS.from_epsg(3035).to_wkt()


def tile(name: str, crs: str, west: float, north: float, *, size: int = 100, px: float = 10.0):
    grid = Grid(crs, (px, 0.0, west, 0.0, -px, north), size, size)
    return TileInfo(name, f"/{name}.tif", grid, None, "float32", 0, "")


def test_tiles_that_share_an_area_overlap_and_touching_ones_do_not():
    tiles = [tile(f"t{i}", UTM, 500_000.0 + 1000.0 * i, 6_000_000.0) for i in range(4)]
    index = TileIndex(tiles)
    assert len(index) == 4
    query = tile("q", UTM, 500_500.0, 6_000_000.0).grid  # half over t0, half over t1
    assert [t.tile_id for t in index.overlapping(query)] == ["t0", "t1"]
    edge = tile("e", UTM, 504_000.0, 6_000_000.0).grid  # touches t3's east edge only
    assert index.overlapping(edge) == []


def test_a_grid_in_another_crs_finds_the_tiles_its_footprint_overlaps():
    tiles = [tile(f"t{i}", UTM, 500_000.0 + 1000.0 * i, 6_000_000.0) for i in range(4)]
    to_laea = Transformer.from_crs(32632, 3035, always_xy=True)
    x, y = to_laea.transform(501_500.0, 5_999_500.0)  # the middle of t1
    query = Grid(LAEA, (10.0, 0.0, x - 100.0, 0.0, -10.0, y + 100.0), 20, 20)
    found = TileIndex(tiles).overlapping(query)
    # pyproj: the query's corners back in EPSG:32632, compared with each tile's box (shapely)
    back = Transformer.from_crs(3035, 32632, always_xy=True)
    left, bottom, right, top = back.transform_bounds(*query.bounds, densify_pts=21)
    want = [
        t.tile_id for t in tiles if box(*t.bounds).intersection(box(left, bottom, right, top)).area
    ]
    assert [t.tile_id for t in found] == want == ["t1"]
    assert same_crs(UTM, CRS.from_epsg(32632).to_wkt()) and not same_crs(UTM, LAEA)
