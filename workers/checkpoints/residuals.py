"""Checkpoint rows of a job (pure): which test tile samples each point, which points keep a
baseline's height, the sampled test heights, the checkpoint heights in the test's datum and
dh = test - checkpoint.

Each step returns new rows (frozen ``CheckpointRow``); the Dask fan-out that samples the tiles
is service/run/checkpoints.py, the summary section workers/checkpoints/section.py.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
from numpy.typing import NDArray
from pyproj import CRS, Transformer
from shapely import STRtree, box, points

from demaudit.workers.checkpoints.points import Checkpoint, CheckpointFile
from demaudit.workers.tile.datum import geoid_undulation, to_metres

Bounds = Sequence[float]  # left, bottom, right, top
USED = "used"
REJECTED = "rejected"

#: Columns of checkpoint_residuals.csv, in order.
RESIDUAL_COLUMNS = (
    "id",
    "status",
    "reason",
    "x",
    "y",
    "height",
    "landcover",
    "cover_group",
    "test_height_m",
    "checkpoint_height_m",
    "dh_m",
)

#: Points a tile samples: (point id, x, y in the test CRS).
TilePoints = list[tuple[str, float, float]]


@dataclass(frozen=True)
class CheckpointRow:
    """One checkpoint (or rejected row) through the audit. x, y, height: as surveyed, in the
    points' CRS and unit; *_test_crs: in the test CRS; heights *_m in metres in the test's
    vertical datum; status '' while its sample is awaited."""

    id: str
    status: str = ""
    reason: str | None = None
    x: float | None = None
    y: float | None = None
    height: float | None = None
    landcover: int | None = None
    x_test_crs: float | None = None
    y_test_crs: float | None = None
    test_height_m: float | None = None
    checkpoint_height_m: float | None = None
    dh_m: float | None = None
    cover_group: str | None = None
    unclassified: bool | None = None

    @property
    def used(self) -> bool:
        return self.status == USED

    def rejected(self, reason: str) -> CheckpointRow:
        return replace(self, status=REJECTED, reason=reason)

    def csv_row(self) -> list[Any]:
        """The row of checkpoint_residuals.csv (None is written as an empty cell)."""
        return [getattr(self, c) for c in RESIDUAL_COLUMNS]


Rows = dict[str, CheckpointRow]


def rejected_rows(data: CheckpointFile) -> Rows:
    """The file's rejected rows; keys of their own, so that a duplicated id does not hide the
    point it repeats."""
    return {
        f"#rejected-{i}": CheckpointRow(r.point_id, REJECTED, r.reason)
        for i, r in enumerate(data.rejected)
    }


def unknown_crs_rows(data: CheckpointFile, crs_name: str | None) -> Rows:
    """Every point rejected: its coordinates cannot be placed."""
    reason = f"unknown CRS {crs_name!r} for the points; name it in checkpoints.crs"
    return {p.point_id: CheckpointRow(p.point_id, REJECTED, reason) for p in data.points}


def points_near(
    xs: NDArray[np.float64], ys: NDArray[np.float64], areas: Sequence[Bounds], margin: float
) -> NDArray[np.bool_]:
    """Which points lie in any of the areas grown by margin on every side (edges included)."""
    inside = np.zeros(xs.shape, dtype=bool)
    for left, bottom, right, top in areas:
        in_x = (xs >= left - margin) & (xs <= right + margin)
        inside |= in_x & (ys >= bottom - margin) & (ys <= top + margin)
    return inside


def first_tiles(
    xs: NDArray[np.float64], ys: NDArray[np.float64], tiles: Sequence[Bounds]
) -> dict[int, int]:
    """Point index -> index of the first tile (in the order given) whose bounds hold it."""
    tree = STRtree([box(*b) for b in tiles])
    hits = tree.query(points(np.column_stack([xs, ys])), predicate="intersects")
    return {int(p): int(t) for p, t in zip(hits[0][::-1], hits[1][::-1], strict=True)}


def place_points(
    checkpoints: Sequence[Checkpoint],
    xs: NDArray[np.float64],
    ys: NDArray[np.float64],
    tiles: Sequence[Bounds],
    *,
    earlier: Mapping[str, float],
    again: NDArray[np.bool_],
) -> tuple[Rows, dict[int, TilePoints]]:
    """Rows of the points (xs, ys: in the test CRS) and, by tile index, the points each tile
    must sample. A point outside every tile is rejected; one holding an earlier height
    (a baseline's) keeps it unless ``again`` marks it (near a tile that changed)."""
    first = first_tiles(xs, ys, tiles)
    rows: Rows = {}
    by_tile: dict[int, TilePoints] = {}
    for i, p in enumerate(checkpoints):
        row = CheckpointRow(
            p.point_id, x=p.x, y=p.y, height=p.height, landcover=p.landcover,
            x_test_crs=float(xs[i]), y_test_crs=float(ys[i]),
        )  # fmt: skip
        if i not in first:
            row = row.rejected("outside every test tile")
        elif not again[i] and p.point_id in earlier:  # nothing under it changed since
            row = replace(row, status=USED, test_height_m=earlier[p.point_id])
        else:
            by_tile.setdefault(first[i], []).append((p.point_id, float(xs[i]), float(ys[i])))
        rows[p.point_id] = row
    return rows, by_tile


def with_samples(rows: Rows, samples: Iterable[tuple[str, float | None, str | None]]) -> Rows:
    """The rows with the test heights (metres) the tiles sampled: (id, value, reason none)."""
    out = dict(rows)
    for point_id, value, reason in samples:
        row = out[point_id]
        out[point_id] = (
            row.rejected(reason) if reason else replace(row, status=USED, test_height_m=value)
        )
    return out


@dataclass(frozen=True)
class Datums:
    """The checkpoint heights' unit and vertical CRS, the test's vertical CRS, and where the
    geoid grids are."""

    units: str
    vertical_crs: str
    test_vertical_crs: str
    grid_dirs: Sequence[str]


def in_test_datum(
    rows: Rows, checkpoints: Sequence[Checkpoint], point_crs: CRS, datums: Datums
) -> Rows:
    """The used rows with the checkpoint height in metres in the test's vertical datum and
    dh = test - checkpoint (metres)."""
    used = [p for p in checkpoints if rows[p.point_id].used]
    if not used:
        return rows
    to_lonlat = Transformer.from_crs(point_crs, "EPSG:4326", always_xy=True)
    lon, lat = to_lonlat.transform([p.x for p in used], [p.y for p in used])
    lon, lat = np.asarray(lon), np.asarray(lat)
    heights = to_metres(np.array([p.height for p in used]), datums.units)
    dirs = datums.grid_dirs
    offset = geoid_undulation(lon, lat, vertical_crs=datums.vertical_crs, grid_dirs=dirs)
    offset -= geoid_undulation(lon, lat, vertical_crs=datums.test_vertical_crs, grid_dirs=dirs)
    out = dict(rows)
    for p, h, off in zip(used, heights, offset, strict=True):
        row = out[p.point_id]
        assert row.test_height_m is not None
        checkpoint_m = float(h + off)
        out[p.point_id] = replace(
            row, checkpoint_height_m=checkpoint_m, dh_m=row.test_height_m - checkpoint_m
        )
    return out
