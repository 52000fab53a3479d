"""Region statistics from merged tile summaries equal numpy on all the region's pixels."""

from __future__ import annotations

import numpy as np
import pytest
import shapely
from pyproj import CRS
from scipy.stats import median_abs_deviation
from shapely.geometry import MultiPolygon, Polygon, box

from demaudit.workers.inputs.catalog import TileInfo
from demaudit.workers.inputs.regions import Region
from demaudit.workers.stats.merge import JobAccumulator, TileExtremes, keyed_summaries
from demaudit.workers.stats.summary import (
    empty,
    nmad_bound_m,
    quantile_bound_m,
    statistics,
    summarise,
)
from demaudit.workers.tile.grid import Grid
from demaudit.workers.tile.task import (
    ALL,
    OK,
    TileOptions,
    TileResult,
    TileSurfaces,
    summarise_tile,
)
from tests.support.merging import accumulate

UTM = CRS.from_epsg(32632).to_wkt()
PIXELS, SIZE, ORIGIN_E, ORIGIN_N = 30, 2.0, 500_000.0, 6_000_000.0


def tile(col: int, row: int) -> TileInfo:
    transform = (
        SIZE,
        0.0,
        ORIGIN_E + col * PIXELS * SIZE,
        0.0,
        -SIZE,
        ORIGIN_N - row * PIXELS * SIZE,
    )
    grid = Grid(UTM, transform, PIXELS, PIXELS)  # type: ignore[arg-type]
    return TileInfo(f"t{col}_{row}", "/dev/null", grid, None, "float32", 0, "")


def heavy_tailed(rng, shape):
    dh = rng.normal(0.2, 0.3, shape)
    hit = rng.random(shape) < 0.02
    dh[hit] += rng.uniform(5, 50, hit.sum()) * rng.choice([-1.0, 1.0], hit.sum())
    return dh


REGIONS = [
    # crosses many tile edges
    Region(
        "CROSS",
        "cross",
        box(ORIGIN_E + 45.3, ORIGIN_N - 401.3, ORIGIN_E + 333.3, ORIGIN_N - 77.3),
        UTM,
    ),
    # a multipolygon, one part with a hole
    Region(
        "HOLED",
        "holed",
        MultiPolygon(
            [
                Polygon(
                    [
                        (ORIGIN_E + 10, ORIGIN_N - 10),
                        (ORIGIN_E + 200, ORIGIN_N - 10),
                        (ORIGIN_E + 200, ORIGIN_N - 150),
                        (ORIGIN_E + 10, ORIGIN_N - 150),
                    ],
                    holes=[
                        [
                            (ORIGIN_E + 50, ORIGIN_N - 50),
                            (ORIGIN_E + 120, ORIGIN_N - 50),
                            (ORIGIN_E + 120, ORIGIN_N - 100),
                            (ORIGIN_E + 50, ORIGIN_N - 100),
                        ]
                    ],
                ),
                box(ORIGIN_E + 300, ORIGIN_N - 470, ORIGIN_E + 470, ORIGIN_N - 300),
            ]
        ),
        UTM,
    ),
]


def test_64_tiles_regions_equal_one_pass_with_numpy():
    rng = np.random.default_rng(5)
    results, pixels = [], {r.region_id: [] for r in REGIONS}
    everything = []
    for row in range(8):
        for col in range(8):
            t = tile(col, row)
            dh = heavy_tailed(rng, (PIXELS, PIXELS))
            dh[rng.random(dh.shape) < 0.05] = np.nan  # voids
            layers = TileSurfaces(dh, np.zeros_like(dh), None)
            results.append(summarise_tile(t, layers, REGIONS, TileOptions()))
            # independent membership: pixel centre inside the polygon (shapely)
            r_idx, c_idx = np.mgrid[0:PIXELS, 0:PIXELS]
            x, y = t.grid.pixel_centres(r_idx.astype(float), c_idx.astype(float))
            for region in REGIONS:
                inside = shapely.contains_xy(region.geometry, x, y) & np.isfinite(dh)
                pixels[region.region_id].append(dh[inside])
            everything.append(dh[np.isfinite(dh)])
    acc = accumulate(results, [r.region_id for r in REGIONS])
    for region_id, parts in [*pixels.items(), ("*", everything)]:
        x = np.concatenate(parts)
        got = statistics(acc.regions[region_id] if region_id != "*" else acc.overall)
        # reference: numpy / scipy on the concatenation (../shared/CHECK_VALUES.md)
        assert got["count"] == x.size
        assert got["mean"] == pytest.approx(x.mean(), rel=1e-9)
        assert got["rmse"] == pytest.approx(np.sqrt(np.mean(x**2)), rel=1e-9)
        med = np.median(x)
        assert abs(got["median"] - med) <= quantile_bound_m(med)
        nmad = median_abs_deviation(x, scale="normal")
        assert abs(got["nmad"] - nmad) <= nmad_bound_m(med, nmad)
        for key, p in (("q683_abs", 0.683), ("q95_abs", 0.95)):
            q = np.quantile(np.abs(x), p)
            assert abs(got[key] - q) <= quantile_bound_m(q)
    assert acc.regions["HOLED"].count < acc.regions["CROSS"].count


def test_resumed_merge_with_removals_equals_a_fresh_merge():
    """A re-check's merge: earlier totals, minus replaced tiles, plus their new results, equals
    merging the final set of tiles from scratch, including min and max when a replaced tile held
    the extreme."""
    rng = np.random.default_rng(11)
    tiles = [tile(col, row) for row in range(4) for col in range(4)]

    def result(t, shift):
        dh = heavy_tailed(rng, (PIXELS, PIXELS)) + shift
        return summarise_tile(t, TileSurfaces(dh, np.zeros_like(dh), None), REGIONS, TileOptions())

    first = [result(t, 0.0) for t in tiles]
    earlier = accumulate(first, [r.region_id for r in REGIONS])
    # the tile holding the job's extreme values is among those replaced
    lowest = min(range(len(first)), key=lambda i: first[i].summary.minimum)
    replaced = sorted({lowest, 3, 9})
    stored = TileExtremes.from_arrays(**earlier.extremes().to_arrays())  # as stored and read
    resumed = JobAccumulator.resume(
        earlier.totals(), stored, excluded=earlier.excluded, region_ids=earlier.region_ids
    )
    final = list(first)
    for i in replaced:
        resumed.remove(tiles[i].tile_id, keyed_summaries(first[i]), excluded=first[i].excluded)
        final[i] = result(tiles[i], 0.4)
        resumed.add(final[i])
    fresh = accumulate(final, [r.region_id for r in REGIONS])
    assert resumed.totals().keys() == fresh.totals().keys()
    for key, want in fresh.totals().items():
        got = resumed.summary(key)
        assert np.array_equal(got.bins, want.bins) and np.array_equal(got.counts, want.counts)
        a, b = statistics(got), statistics(want)
        for stat in ("count", "median", "nmad", "q683_abs", "q95_abs", "min", "max"):
            assert a[stat] == b[stat], (key, stat)
        for stat in ("mean", "std", "rmse"):
            assert a[stat] == (None if b[stat] is None else pytest.approx(b[stat], rel=1e-12))


def test_removing_every_tile_leaves_empty_totals():
    rng = np.random.default_rng(3)
    t = tile(0, 0)
    dh = heavy_tailed(rng, (PIXELS, PIXELS))
    only = summarise_tile(t, TileSurfaces(dh, np.zeros_like(dh), None), REGIONS, TileOptions())
    acc = accumulate([only])
    acc.remove(t.tile_id, keyed_summaries(only), excluded=0)
    assert statistics(acc.overall) == statistics(empty())


def test_a_key_whose_last_tile_goes_leaves_the_merge_as_in_a_fresh_run():
    """A stratum only one tile had (land cover there, none elsewhere) disappears with that tile,
    and the co-registration part empties, exactly as when merging the rest from scratch."""
    rng = np.random.default_rng(8)
    dh = rng.normal(0.1, 0.3, 1000)
    plain = TileResult(
        "a", OK, None, summary=summarise(dh), strata={ALL: {"slope:0-5": summarise(dh)}}
    )
    covered = TileResult(
        "b",
        OK,
        None,
        summary=summarise(dh),
        regions={"R1": summarise(dh[:500])},
        strata={ALL: {"slope:0-5": summarise(dh), "cover_group:vegetated": summarise(dh[:99])}},
    )
    acc = accumulate([plain, covered], ["R1"])
    acc.remove("b", keyed_summaries(covered), excluded=0)
    fresh = accumulate([plain], ["R1"])
    assert acc.totals().keys() == fresh.totals().keys()
    assert list(acc.strata_of(ALL)) == ["slope:0-5"] and acc.regions["R1"].count == 0
    empty_after = accumulate([plain])
    empty_after.remove("a", keyed_summaries(plain), excluded=0)
    assert empty_after.is_empty and not fresh.is_empty
