"""Vertical datum and height units: bring heights to metres and to one vertical reference.

Heights above a geoid (orthometric, H) and above the ellipsoid (h) differ by the geoid undulation:
h = H + N. N comes from PROJ's geoid grids through pyproj (EGM96: ``egm96_15.gtx`` from Debian's
proj-data). The transformation must use the grid: PROJ is asked for its best operation only, with
error checking, and a ballpark (grid-less) operation is refused, so a missing grid is a
:class:`~workers.errors.GeoidGridError`, never a silent zero.
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from functools import lru_cache
from pathlib import Path

import numpy as np
import pyproj
from numpy.typing import NDArray
from pyproj import CRS, Transformer
from pyproj.crs import CompoundCRS
from pyproj.exceptions import ProjError
from pyproj.transformer import TransformerGroup

from workers.errors import GeoidGridError
from workers.grid import Grid
from workers.spec import ELLIPSOIDAL, METRES_PER_UNIT

#: Where Debian's proj-data installs PROJ's grids.
DEFAULT_GRID_DIRS: tuple[str, ...] = ("/usr/share/proj",)
#: Pixels between lattice nodes when N is evaluated on a coarse lattice and interpolated.
LATTICE_STEP_PX = 64


def to_metres(heights: NDArray[np.floating], units: str) -> NDArray[np.float64]:
    """Convert heights in 'metre', 'foot' (international) or 'us_survey_foot' to metres.

    NaN (nodata) stays NaN.
    """
    if units not in METRES_PER_UNIT:
        raise ValueError(f"unknown height unit {units!r}; expected one of {list(METRES_PER_UNIT)}")
    return np.asarray(heights, dtype=np.float64) * METRES_PER_UNIT[units]


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
    step_px: int = LATTICE_STEP_PX,
) -> NDArray[np.float64]:
    """N (metres) at every pixel centre of grid, evaluated on a lattice every step_px pixels and
    interpolated bilinearly (N is smooth: the error stays far below 1 mm at this spacing)."""
    if vertical_crs == ELLIPSOIDAL:
        return np.zeros(grid.shape)
    rows = _lattice(grid.height, step_px)
    cols = _lattice(grid.width, step_px)
    x, y = grid.pixel_centres(rows[:, None], cols[None, :])
    to_lonlat = Transformer.from_crs(grid.pyproj_crs, CRS.from_epsg(4326), always_xy=True)
    lon, lat = to_lonlat.transform(x, y)
    n_nodes = geoid_undulation(lon, lat, vertical_crs=vertical_crs, grid_dirs=grid_dirs)
    w_rows = _linear_weights(grid.height, rows)
    w_cols = _linear_weights(grid.width, cols)
    return w_rows @ n_nodes @ w_cols.T  # type: ignore[no-any-return]


def vertical_offset_on_grid(
    grid: Grid,
    *,
    from_crs: str,
    to_crs: str,
    grid_dirs: Sequence[str] = DEFAULT_GRID_DIRS,
) -> NDArray[np.float64] | None:
    """What to add to heights in from_crs to express them in to_crs (metres), per pixel of grid:
    N_from - N_to. None when the two vertical references are the same."""
    if from_crs == to_crs:
        return None
    n_from = undulation_on_grid(grid, vertical_crs=from_crs, grid_dirs=grid_dirs)
    n_to = undulation_on_grid(grid, vertical_crs=to_crs, grid_dirs=grid_dirs)
    return n_from - n_to


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
