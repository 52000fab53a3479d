"""Vertical datum and height units: bring heights to metres and to one vertical reference.

Heights above a geoid (orthometric, H) and above the ellipsoid (h) differ by the geoid undulation:
h = H + N. N comes from PROJ's geoid grids through pyproj (EGM96: ``egm96_15.gtx`` from Debian's
proj-data). The transformation must use the grid: PROJ is asked for its best operation only, with
error checking, and a ballpark (grid-less) operation is refused, so a missing grid is a
:class:`~demaudit.workers.errors.GeoidGridError`, never a silent zero.

On a raster grid (:func:`undulation_on_grid`) N is PROJ's own bilinear interpolation of the geoid
grid, evaluated at every pixel centre: PROJ gives N at the few grid nodes around the tile (called
at the nodes' exact coordinates, so no grid format is parsed; the grid file's header only says
where the nodes are), and numpy interpolates between them as PROJ does. Only the pixel centres'
longitude and latitude are interpolated, linearly on a lattice at most ``LATTICE_SPACING_M``
apart: they are smooth, the position error stays below 0.3 m (measured: UTM tiles up to 9
degrees off the central meridian, up to 75 degrees latitude), and EGM96 is nowhere steeper than
0.35 m/km (from its 15' grid), so this adds at most 0.1 mm.

**Error bound: N on a raster grid agrees with PROJ evaluated at every pixel within 1 mm**
(measured at most 0.02 mm over the Puerto Rico trench and the Himalaya at 30 m and 90 m pixels;
tests/workers/tile/test_datum.py). Before, N came from a 64-pixel lattice and missed the grid's
kinks between nodes: up to 25-36 mm at 30 m and 143-186 mm at 90 m pixels at those sites. The
lattices and the banded bilinear evaluation are in workers/tile/geoid_lattice.py. A self-check
against PROJ at the lattice points falls back to PROJ at every pixel (exact, about 1 s per
million pixels) when the node model does not reproduce PROJ, e.g. an operation with several
grids or horizontal steps. Pixels outside the geoid grid are NaN. Cost for 1500 x 1500 pixels:
see benchmarks/bench_geoid.py.

:func:`vertical_transformation` states PROJ's own accuracy of each conversion used (EPSG's
"accuracy" of the operation; the sum over concatenated steps as PROJ counts it).
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from functools import lru_cache
from pathlib import Path
from typing import Any

import numpy as np
import pyproj
import rasterio
import rasterio.errors
from numpy.typing import NDArray
from pyproj import CRS, Transformer
from pyproj.crs import CompoundCRS
from pyproj.exceptions import ProjError
from pyproj.transformer import TransformerGroup

from demaudit.workers.errors import GeoidGridError
from demaudit.workers.spec import ELLIPSOIDAL, METRES_PER_UNIT, JobSpec
from demaudit.workers.tile.geoid_lattice import (
    LonLatLattice,
    NodeLattice,
    NodeValues,
    _banded_bilinear,
    _bilinear,
    _CellTable,
)
from demaudit.workers.tile.geoid_lattice import (  # re-exported for datum's importers
    bilinear_on_nodes as bilinear_on_nodes,
)
from demaudit.workers.tile.grid import Grid

#: Where Debian's proj-data installs PROJ's grids.
DEFAULT_GRID_DIRS: tuple[str, ...] = ("/usr/share/proj",)
#: Largest difference from PROJ at the lattice points for the grid's node model to be used.
SELF_CHECK_M = 1e-5


def to_metres(heights: NDArray[np.floating], units: str) -> NDArray[np.float64]:
    """Convert heights in 'metre', 'foot' (international) or 'us_survey_foot' to metres.

    NaN (nodata) stays NaN. Float64 heights in metres come back as they are (not copied).
    """
    if units not in METRES_PER_UNIT:
        raise ValueError(f"unknown height unit {units!r}; expected one of {list(METRES_PER_UNIT)}")
    factor = METRES_PER_UNIT[units]
    if factor == 1.0:
        return np.asarray(heights, dtype=np.float64)
    return np.asarray(heights, dtype=np.float64) * factor


def register_grid_dirs(grid_dirs: Sequence[str]) -> None:
    """Let PROJ find grids in these folders (idempotent)."""
    current = pyproj.datadir.get_data_dir().split(os.pathsep)
    for folder in grid_dirs:
        if Path(folder).is_dir() and folder not in current:
            pyproj.datadir.append_data_dir(folder)


@lru_cache(maxsize=16)
def _undulation_transformer(vertical_crs: str, grid_dirs: tuple[str, ...]) -> Transformer:
    """The grid-based transformation from (lon, lat, height in vertical_crs) to WGS 84 3D."""
    register_grid_dirs(grid_dirs)
    source = CompoundCRS(
        name=f"WGS 84 + {vertical_crs}", components=[CRS.from_epsg(4326), CRS(vertical_crs)]
    )
    group = TransformerGroup(source, CRS.from_epsg(4979), always_xy=True)
    best = group.transformers[0] if group.transformers else None
    if best is None or not group.best_available or "ballpark" in best.description.lower():
        offered = best.description if best is not None else "nothing"
        raise GeoidGridError(
            _missing_grid_message(vertical_crs, grid_dirs, f"PROJ offers only {offered!r}")
        )
    return best


def _missing_grid_message(vertical_crs: str, grid_dirs: Sequence[str], why: object) -> str:
    return (
        f"cannot convert {vertical_crs} heights to ellipsoidal heights: the geoid grid is not "
        f"available ({why}). Put the grid in one of {list(grid_dirs)} (EGM96: egm96_15.gtx from "
        f"Debian's proj-data, installed by deploy/setup.sh)."
    )


def geoid_undulation(
    lon: NDArray[np.float64],
    lat: NDArray[np.float64],
    *,
    vertical_crs: str,
    grid_dirs: Sequence[str] = DEFAULT_GRID_DIRS,
) -> NDArray[np.float64]:
    """Height of the vertical_crs surface above the WGS 84 ellipsoid, N (metres), at lon/lat
    (degrees, WGS 84). Zero for 'ellipsoidal'. Raises GeoidGridError when the grid is missing."""
    lon = np.asarray(lon, dtype=np.float64)
    if vertical_crs == ELLIPSOIDAL:
        return np.zeros(lon.shape)
    transformer = _undulation_transformer(vertical_crs, tuple(grid_dirs))
    try:
        _, _, h = transformer.transform(
            lon, np.asarray(lat, np.float64), np.zeros(lon.shape), errcheck=True
        )
    except ProjError as exc:
        raise GeoidGridError(_missing_grid_message(vertical_crs, grid_dirs, exc)) from None
    return np.asarray(h, dtype=np.float64)


def undulation_on_grid(
    grid: Grid,
    *,
    vertical_crs: str,
    grid_dirs: Sequence[str] = DEFAULT_GRID_DIRS,
    step_px: int | None = None,
) -> NDArray[np.float64]:
    """N (metres) at every pixel centre of grid: the geoid grid's bilinear interpolation at each
    pixel (see the module docstring for the bound). Zero for 'ellipsoidal'; NaN outside the geoid
    grid. step_px overrides the lattice of pixel-centre longitudes/latitudes (default
    :func:`lattice_step_px`)."""
    if vertical_crs == ELLIPSOIDAL:
        return np.zeros(grid.shape)
    lattice = LonLatLattice.of(grid, step_px=step_px)
    return _undulation_on_pixels(lattice, vertical_crs=vertical_crs, grid_dirs=grid_dirs)


def vertical_offset_on_grid(
    grid: Grid,
    *,
    from_crs: str,
    to_crs: str,
    grid_dirs: Sequence[str] = DEFAULT_GRID_DIRS,
    step_px: int | None = None,
) -> NDArray[np.float64] | None:
    """What to add to heights in from_crs to express them in to_crs (metres), per pixel of grid:
    N_from - N_to. None when the two vertical references are the same."""
    if from_crs == to_crs:
        return None
    lattice = LonLatLattice.of(grid, step_px=step_px)
    offset = np.zeros(grid.shape)
    for crs, sign in ((from_crs, 1.0), (to_crs, -1.0)):
        if crs != ELLIPSOIDAL:
            offset += sign * _undulation_on_pixels(lattice, vertical_crs=crs, grid_dirs=grid_dirs)
    return offset


def vertical_transformations(
    spec: JobSpec, *, grid_dirs: Sequence[str] = DEFAULT_GRID_DIRS
) -> list[dict[str, Any]]:
    """The vertical datum conversions a job makes (reference heights, then checkpoint heights,
    into the test's vertical reference), each with PROJ's operations and stated accuracy (see
    :func:`vertical_transformation`); none when all share one vertical reference."""
    records = []
    for role, source in (("reference", spec.reference), ("checkpoints", spec.checkpoints)):
        if source is None:
            continue
        record = vertical_transformation(
            from_crs=source.vertical_crs, to_crs=spec.test.vertical_crs, grid_dirs=grid_dirs
        )
        if record is not None:
            records.append({"role": role} | record)
    return records


def vertical_transformation(
    *, from_crs: str, to_crs: str, grid_dirs: Sequence[str] = DEFAULT_GRID_DIRS
) -> dict[str, Any] | None:
    """How demaudit brings heights in from_crs to to_crs, as PROJ describes it: the operations
    (each vertical CRS to WGS 84 ellipsoidal heights, then back) and PROJ's stated accuracy
    (see :func:`conversion_accuracy_m`). None when the two are the same (nothing to convert).
    Raises GeoidGridError when a grid is missing."""
    if from_crs == to_crs:
        return None
    operations = [
        _undulation_transformer(crs, tuple(grid_dirs)).description
        for crs in (from_crs, to_crs)
        if crs != ELLIPSOIDAL
    ]
    return {
        "from": from_crs,
        "to": to_crs,
        "operations": operations,
        "accuracy_m": conversion_accuracy_m(from_crs=from_crs, to_crs=to_crs, grid_dirs=grid_dirs),
    }


def conversion_accuracy_m(
    *, from_crs: str, to_crs: str, grid_dirs: Sequence[str] = DEFAULT_GRID_DIRS
) -> float | None:
    """PROJ's stated accuracy (metres) of converting heights from from_crs to to_crs the way
    demaudit does it (each side through WGS 84 ellipsoidal heights): 0 when they are the same,
    else the sum of the operations' accuracies, PROJ's own rule for concatenated operations;
    None when PROJ states none for any of them (pyproj reports -1)."""
    if from_crs == to_crs:
        return 0.0
    total = 0.0
    for crs in (c for c in (from_crs, to_crs) if c != ELLIPSOIDAL):
        accuracy = _undulation_transformer(crs, tuple(grid_dirs)).accuracy
        if accuracy is None or accuracy < 0:
            return None
        total += float(accuracy)
    return total


def _undulation_on_pixels(
    lattice: LonLatLattice, *, vertical_crs: str, grid_dirs: Sequence[str]
) -> NDArray[np.float64]:
    """N at every pixel: the geoid grid's bilinear form when it reproduces PROJ at the lattice
    nodes, else PROJ at every pixel (exact, about a second per million pixels)."""
    nodes = _node_lattice(vertical_crs, tuple(grid_dirs))
    exact = _proj_undulation(lattice.lon, lattice.lat, vertical_crs, grid_dirs)
    if nodes is not None:
        n = _bilinear_on_pixels(lattice, nodes, _node_values(vertical_crs, grid_dirs))
        check = lattice.at_nodes(n)
        if np.array_equal(np.isnan(exact), np.isnan(check)) and not np.any(
            np.abs(exact - check) > SELF_CHECK_M
        ):
            return n
    if np.isnan(exact).all():
        raise GeoidGridError(
            _missing_grid_message(vertical_crs, grid_dirs, "PROJ gives no value on this tile")
        )
    return _proj_undulation(
        lattice.to_pixels(lattice.lon), lattice.to_pixels(lattice.lat), vertical_crs, grid_dirs
    )


def _bilinear_on_pixels(
    lattice: LonLatLattice, nodes: NodeLattice, node_values: NodeValues
) -> NDArray[np.float64]:
    """The nodes' bilinear interpolation at every pixel of the lattice's grid."""
    fi, fj = nodes.coordinates(lattice.lon, lattice.lat)
    if min(lattice.rows.size, lattice.cols.size) < 2 or not nodes.inside(fi, fj).all():
        return _bilinear(lattice.to_pixels(fi), lattice.to_pixels(fj), nodes, node_values)
    # the pixels' positions are convex combinations of the lattice's: the lattice's span is theirs
    table = _CellTable.build(nodes, node_values, (fi.min(), fi.max()), (fj.min(), fj.max()))
    return _banded_bilinear(lattice, fi - table.i0, fj - table.j0, table)


def _node_values(vertical_crs: str, grid_dirs: Sequence[str]) -> NodeValues:
    def values(lon: NDArray[np.float64], lat: NDArray[np.float64]) -> NDArray[np.float64]:
        return _proj_undulation(lon, lat, vertical_crs, grid_dirs)

    return values


def _proj_undulation(
    lon: NDArray[np.float64], lat: NDArray[np.float64], vertical_crs: str, grid_dirs: Sequence[str]
) -> NDArray[np.float64]:
    """N from PROJ at each point; NaN where PROJ has none (outside the grid)."""
    transformer = _undulation_transformer(vertical_crs, tuple(grid_dirs))
    wrapped = (np.asarray(lon, np.float64) + 180.0) % 360.0 - 180.0
    _, _, h = transformer.transform(
        wrapped, np.asarray(lat, np.float64), np.zeros(np.shape(lon)), errcheck=False
    )
    h = np.asarray(h, dtype=np.float64)
    return np.where(np.isfinite(h), h, np.nan)


@lru_cache(maxsize=16)
def _node_lattice(vertical_crs: str, grid_dirs: tuple[str, ...]) -> NodeLattice | None:
    """The node lattice of the one geoid grid PROJ's operation interpolates, when the operation
    is only that grid (plus unit and axis-order steps); None otherwise."""
    transformer = _undulation_transformer(vertical_crs, grid_dirs)
    steps = [step.split() for step in f" {transformer.definition}".split(" step ")[1:]]
    methods = [next((w[5:] for w in step if w.startswith("proj=")), "") for step in steps]
    if methods.count("vgridshift") != 1 or set(methods) - {"vgridshift", "unitconvert", "axisswap"}:
        return None
    grids = [g for op in transformer.operations or () for g in op.grids]
    if len(grids) != 1 or not grids[0].full_name or not Path(grids[0].full_name).is_file():
        return None  # several grids, or one PROJ reads from the network: PROJ at every pixel
    return _read_node_lattice(grids[0].full_name)


def _read_node_lattice(path: str) -> NodeLattice | None:
    """The node lattice of a geoid grid file (.gtx or GeoTIFF), from its header via GDAL (which
    reports pixel-is-area bounds: the nodes are the cell centres)."""
    try:
        with rasterio.open(path) as dataset:
            a, b, c, d, e, f = dataset.transform[:6]
            rows, cols = dataset.height, dataset.width
            geographic = dataset.crs is None or dataset.crs.is_geographic
    except (OSError, rasterio.errors.RasterioError):
        return None
    if b != 0 or d != 0 or a <= 0 or e >= 0 or rows < 2 or cols < 2 or not geographic:
        return None
    return NodeLattice(c + a / 2, f + e / 2, a, -e, rows, cols)
