"""Lattices for the geoid on a raster grid (pure): pixel-centre longitude/latitude interpolated
on a coarse lattice (LonLatLattice), the geoid grid's nodes (NodeLattice), and PROJ's bilinear
interpolation between nodes evaluated at every pixel (bilinear_on_nodes, a banded cell table).
The error bounds and their measurement are in workers/tile/datum.py's docstring, which uses them.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray
from pyproj import CRS, Transformer

from demaudit.workers.tile.grid import Grid

#: Most pixels between the lattice nodes on which pixel-centre longitude/latitude are computed.
LATTICE_STEP_PX = 64
#: Most ground distance (metres) between those nodes: the interpolated positions' error grows
#: with its square (below 0.3 m at 2 km, see the module docstring; about 0.9 m at 5.8 km).
LATTICE_SPACING_M = 2000.0


def lattice_step_px(grid: Grid) -> int:
    """Pixels between lattice nodes: at most LATTICE_STEP_PX and at most LATTICE_SPACING_M on
    the ground (the interpolation error of longitude/latitude grows with the spacing squared)."""
    pixel_m = max(grid.pixel_size_m())
    if not np.isfinite(pixel_m) or pixel_m <= 0:
        return 1
    return int(np.clip(np.floor(LATTICE_SPACING_M / pixel_m), 1, LATTICE_STEP_PX))


@dataclass(frozen=True)
class LonLatLattice:
    """Exact longitude and latitude (degrees, WGS 84) of a grid's pixel centres on a lattice of
    pixels (``rows`` x ``cols``, always including the last row and column), from which any
    smooth per-pixel quantity is interpolated bilinearly. Longitudes are made continuous across
    the tile (they may leave [-180, 180] on a tile that crosses the antimeridian)."""

    shape: tuple[int, int]
    rows: NDArray[np.float64]
    cols: NDArray[np.float64]
    lon: NDArray[np.float64]
    lat: NDArray[np.float64]

    @classmethod
    def of(cls, grid: Grid, *, step_px: int | None = None) -> LonLatLattice:
        step = lattice_step_px(grid) if step_px is None else step_px
        rows = _lattice(grid.height, step)
        cols = _lattice(grid.width, step)
        x, y = grid.pixel_centres(rows[:, None], cols[None, :])
        to_lonlat = Transformer.from_crs(grid.pyproj_crs, CRS.from_epsg(4326), always_xy=True)
        lon, lat = to_lonlat.transform(x, y)
        lon = _continuous_longitude(np.asarray(lon, dtype=np.float64))
        return cls(grid.shape, rows, cols, lon, np.asarray(lat, dtype=np.float64))

    def to_pixels(self, values: NDArray[np.float64]) -> NDArray[np.float64]:
        """values given on the lattice, interpolated bilinearly to every pixel."""
        return _interpolate_lattice(values, self.rows, self.cols, self.shape)

    def at_nodes(self, per_pixel: NDArray[np.float64]) -> NDArray[np.float64]:
        """A per-pixel array's values at the lattice nodes."""
        return per_pixel[np.ix_(self.rows.astype(np.intp), self.cols.astype(np.intp))]


@dataclass(frozen=True)
class NodeLattice:
    """Where a geoid grid's nodes lie: node (row j, column i) at longitude lon0 + i * dlon and
    latitude lat0 - j * dlat (nodes at the cell corners, rows from north to south)."""

    lon0: float
    lat0: float
    dlon: float
    dlat: float
    rows: int
    cols: int

    @property
    def period(self) -> int | None:
        """Columns per turn when the columns go round the globe (the last column's east
        neighbour is the first column, or a repeat of it), else None."""
        turns = 360.0 / self.dlon
        for period in (self.cols, self.cols - 1):
            if abs(period - turns) < 1e-6:
                return period
        return None

    def coordinates(
        self, lon: NDArray[np.float64], lat: NDArray[np.float64]
    ) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """Fractional column and row of lon/lat (degrees) in the lattice. Longitudes are taken
        as given on a grid that goes round the globe (columns repeat every ``period``), and
        brought into [lon0, lon0 + 360) otherwise."""
        east = np.asarray(lon, dtype=np.float64) - self.lon0
        if self.period is None:
            east = east % 360.0
        return east / self.dlon, (self.lat0 - np.asarray(lat, dtype=np.float64)) / self.dlat

    def inside(self, fi: NDArray[np.float64], fj: NDArray[np.float64]) -> NDArray[np.bool_]:
        """Which fractional positions the grid covers (finite and within its nodes)."""
        ok = np.isfinite(fi) & np.isfinite(fj) & (fj >= 0) & (fj <= self.rows - 1)
        if self.period is None:
            ok &= (fi >= 0) & (fi <= self.cols - 1)
        return ok  # type: ignore[no-any-return]


NodeValues = Callable[[NDArray[np.float64], NDArray[np.float64]], NDArray[np.float64]]


def bilinear_on_nodes(
    lon: NDArray[np.float64],
    lat: NDArray[np.float64],
    nodes: NodeLattice,
    node_values: NodeValues,
) -> NDArray[np.float64]:
    """Bilinear interpolation between the nodes of a regular lon/lat grid at lon/lat (degrees),
    as PROJ interpolates its geoid grids. node_values(lon, lat) gives the values at the nodes
    covering the points (asked once, for one small block). NaN outside the grid, where lon/lat
    are not finite, and next to a node without a value (NaN)."""
    fi, fj = nodes.coordinates(lon, lat)
    return _bilinear(fi, fj, nodes, node_values)


def _bilinear(
    fi: NDArray[np.float64],
    fj: NDArray[np.float64],
    nodes: NodeLattice,
    node_values: NodeValues,
) -> NDArray[np.float64]:
    """Bilinear interpolation at fractional columns fi and rows fj of nodes (see
    bilinear_on_nodes)."""
    inside = nodes.inside(fi, fj)
    result = np.full(np.shape(fi), np.nan)
    if not inside.any():
        return result
    fi, fj = fi[inside], fj[inside]
    table = _CellTable.build(nodes, node_values, (fi.min(), fi.max()), (fj.min(), fj.max()))
    result[inside] = table.evaluate(fi - table.i0, fj - table.j0)
    return result


@dataclass(frozen=True)
class _CellTable:
    """The bilinear form of each cell of a block of nodes whose first node is (j0, i0): at
    position (tx, ty) in [0, 1]^2 within cell k the value is a + tx (b + ty d) + ty c. The
    block's last node row and column are repeated twice, so that points on its last nodes
    (or a rounding beyond) still find a cell."""

    i0: int
    j0: int
    width: int
    a: NDArray[np.float64]
    b: NDArray[np.float64]
    c: NDArray[np.float64]
    d: NDArray[np.float64]

    @classmethod
    def build(
        cls,
        nodes: NodeLattice,
        node_values: NodeValues,
        span_i: tuple[float, float],
        span_j: tuple[float, float],
    ) -> _CellTable:
        """The cells covering fractional columns span_i and rows span_j, with node values from
        node_values (asked once, at the nodes' exact longitude and latitude)."""
        i0, i1 = _node_span(*span_i, nodes.cols, nodes.period)
        j0, j1 = _node_span(*span_j, nodes.rows, None)
        node_lon = nodes.lon0 + np.arange(i0, i1 + 1) * nodes.dlon
        node_lat = nodes.lat0 - np.arange(j0, j1 + 1) * nodes.dlat
        grid_lon, grid_lat = np.meshgrid((node_lon + 180.0) % 360.0 - 180.0, node_lat)
        v = np.asarray(node_values(grid_lon, grid_lat), dtype=np.float64)
        v = np.pad(v.reshape(grid_lon.shape), ((0, 2), (0, 2)), mode="edge")
        a = v[:-1, :-1]
        b = v[:-1, 1:] - a
        c = v[1:, :-1] - a
        d = v[1:, 1:] - v[1:, :-1] - b
        return cls(i0, j0, a.shape[1], a.ravel(), b.ravel(), c.ravel(), d.ravel())

    def evaluate(self, fi: NDArray[np.float64], fj: NDArray[np.float64]) -> NDArray[np.float64]:
        """Values at fractional column fi and row fj counted from (j0, i0), both >= 0. fi and fj
        are overwritten (scratch space, to keep the passes over the pixels few)."""
        i = fi.astype(np.intp)
        cell = fj.astype(np.intp)
        fi -= i
        fj -= cell
        cell *= self.width
        cell += i
        value, b, c, d = self.a.take(cell), self.b.take(cell), self.c.take(cell), self.d.take(cell)
        d *= fj
        b += d
        b *= fi
        value += b
        c *= fj
        value += c
        return value

    def quadratic(
        self,
        x0: NDArray[np.float64],
        y0: NDArray[np.float64],
        dx: NDArray[np.float64],
        dy: NDArray[np.float64],
        cell: NDArray[np.intp],
    ) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
        """Coefficients of value = p0 + p1 t + p2 t^2 along segments that go from (x0, y0) to
        (x0 + dx, y0 + dy) inside one cell (positions counted from the cell's first node)."""
        a, b, c, d = self.a[cell], self.b[cell], self.c[cell], self.d[cell]
        p0 = a + b * x0 + c * y0 + d * x0 * y0
        p1 = b * dx + c * dy + d * (x0 * dy + y0 * dx)
        return p0, p1, d * dx * dy


def _banded_bilinear(
    lattice: LonLatLattice, fi: NDArray[np.float64], fj: NDArray[np.float64], table: _CellTable
) -> NDArray[np.float64]:
    """Bilinear interpolation of the cell table at every pixel, where the fractional column fi
    and row fj (counted from the table's first node) are given on the lattice.

    Along one pixel row between two lattice columns (a segment), fi and fj are linear in the
    position t in [0, 1] across it. Where the segment stays in one geoid cell, N is therefore a
    quadratic in t whose three coefficients are found per segment; only the segments that a
    node line crosses (a few per row) are evaluated pixel by pixel."""
    height, width = lattice.shape
    rows, cols = lattice.rows, lattice.cols
    band = np.clip(np.searchsorted(rows, np.arange(height), side="right") - 1, 0, rows.size - 2)
    s = ((np.arange(height) - rows[band]) / (rows[band + 1] - rows[band]))[:, None]
    row_i = fi[band] + s * (fi[band + 1] - fi[band])  # on the lattice columns, every pixel row
    row_j = fj[band] + s * (fj[band + 1] - fj[band])
    counts = np.diff(cols).astype(np.intp)
    counts[-1] += 1  # the last segment ends on the last pixel (t = 1)
    starts = np.concatenate([[0], np.cumsum(counts)[:-1]])
    t = (np.arange(width) - np.repeat(cols[:-1], counts)) / np.repeat(np.diff(cols), counts)
    x0, y0 = row_i[:, :-1], row_j[:, :-1]
    dx, dy = np.diff(row_i, axis=1), np.diff(row_j, axis=1)
    i = np.floor(np.minimum(x0, x0 + dx))
    j = np.floor(np.minimum(y0, y0 + dy))
    crossed = (np.floor(np.maximum(x0, x0 + dx)) != i) | (np.floor(np.maximum(y0, y0 + dy)) != j)
    i, j = np.maximum(i, 0), np.maximum(j, 0)
    p0, p1, p2 = table.quadratic(x0 - i, y0 - j, dx, dy, (j * table.width + i).astype(np.intp))
    out = np.repeat(p2, counts, axis=1)
    out *= t
    out += np.repeat(p1, counts, axis=1)
    out *= t
    out += np.repeat(p0, counts, axis=1)
    seg_row, seg = np.nonzero(crossed)
    if seg.size:
        size = counts[seg]
        first = np.cumsum(size) - size
        col = np.repeat(starts[seg], size) + np.arange(int(size.sum())) - np.repeat(first, size)
        at = t[col]
        x = np.repeat(x0[seg_row, seg], size) + np.repeat(dx[seg_row, seg], size) * at
        y = np.repeat(y0[seg_row, seg], size) + np.repeat(dy[seg_row, seg], size) * at
        out[np.repeat(seg_row, size), col] = table.evaluate(x, y)
    return out


def _node_span(low: float, high: float, count: int, period: int | None) -> tuple[int, int]:
    """First and last node index needed to interpolate at fractional indices in [low, high]."""
    first, last = int(np.floor(low)), int(np.floor(high)) + 1
    if period is None:
        first, last = max(first, 0), min(last, count - 1)
    return first, max(last, first)


def _continuous_longitude(lon: NDArray[np.float64]) -> NDArray[np.float64]:
    """Longitudes shifted by whole turns to lie within 180 degrees of the lattice's middle node,
    so that interpolating them is continuous across the antimeridian."""
    finite = lon[np.isfinite(lon)]
    if finite.size == 0:
        return lon
    middle = lon.flat[lon.size // 2]
    ref = float(middle if np.isfinite(middle) else finite[0])
    return ref + (lon - ref + 180.0) % 360.0 - 180.0


def _interpolate_lattice(
    values: NDArray[np.float64],
    rows: NDArray[np.float64],
    cols: NDArray[np.float64],
    shape: tuple[int, int],
) -> NDArray[np.float64]:
    """Bilinear interpolation of values on lattice (rows x cols) to every pixel of shape."""
    along_rows = _linear_weights(shape[0], rows) @ values
    if cols.size == 1:
        return np.repeat(along_rows, shape[1], axis=1)
    pixels = np.arange(shape[1], dtype=np.float64)
    right = np.clip(np.searchsorted(cols, pixels, side="right"), 1, cols.size - 1)
    left = right - 1
    t = (pixels - cols[left]) / (cols[right] - cols[left])
    return along_rows[:, left] * (1.0 - t) + along_rows[:, right] * t  # type: ignore[no-any-return]


def _lattice(n_pixels: int, step: int) -> NDArray[np.float64]:
    """Pixel indices of lattice nodes: 0, step, 2 step, ... and always the last pixel."""
    nodes = np.arange(0, n_pixels, step, dtype=np.float64)
    if nodes[-1] != n_pixels - 1:
        nodes = np.append(nodes, n_pixels - 1)
    return nodes


def _linear_weights(n_pixels: int, nodes: NDArray[np.float64]) -> NDArray[np.float64]:
    """Matrix (n_pixels x len(nodes)) of 1-D linear interpolation weights."""
    weights = np.zeros((n_pixels, nodes.size))
    if nodes.size == 1:
        weights[:, 0] = 1.0
        return weights
    pixels = np.arange(n_pixels, dtype=np.float64)
    right = np.clip(np.searchsorted(nodes, pixels, side="right"), 1, nodes.size - 1)
    left = right - 1
    t = (pixels - nodes[left]) / (nodes[right] - nodes[left])
    weights[np.arange(n_pixels), left] = 1.0 - t
    weights[np.arange(n_pixels), right] += t
    return weights
