"""The standardised dh overview in results.zarr (group ``standardised_dh_overview``, variable
``z``, on the dh overview's grid and CRS).

Each cell is (block mean of dh - centre_m) / sigma_dh(block mean slope, block mean |curvature|):
the dh overview divided by the error model's sigma at the block's mean terrain (the terrain
blocks come with each tile's stored error-model sample, workers/uncertainty/sample_store.py). It
is not the block mean of per-pixel z (that would need a second pass over the pixels): it shows
where dh departs from zero by more than the terrain lets one expect. Written one tile at a time
(memory flat with archive size), after the model is fitted.
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np
import rioxarray  # noqa: F401 - registers the .rio accessor
import xarray as xr
import zarr
from numpy.typing import NDArray

from demaudit.workers.outputs.layout import OVERVIEW_GROUP, STANDARDISED_OVERVIEW_GROUP
from demaudit.workers.uncertainty.sample_store import ErrorSampleStore
from demaudit.workers.uncertainty.sigma import SigmaModel

GROUP = STANDARDISED_OVERVIEW_GROUP
DH_GROUP = OVERVIEW_GROUP
LONG_NAME = (
    "standardised dh: (block mean dh - centre_m) / sigma_dh(block mean slope, block mean "
    "|curvature|) of summary.json error_model"
)


def sigma_of(section: Mapping[str, Any]) -> SigmaModel:
    """The sigma model of a summary.json ``error_model`` section."""
    s = section["sigma_model"]
    return SigmaModel(float(s["a_m"]), float(s["b_m"]), float(s["c"]), float(s["d_m"]))


def standardised_block(
    dh: NDArray[np.floating], terrain: NDArray[np.floating], sigma: SigmaModel, centre_m: float
) -> NDArray[np.float32]:
    """(dh - centre) / sigma(slope, curvature) for a dh block and its (2, rows, cols) terrain."""
    with np.errstate(invalid="ignore", divide="ignore"):
        z = (np.asarray(dh, np.float64) - centre_m) / sigma(
            np.asarray(terrain[0], np.float64), np.asarray(terrain[1], np.float64)
        )
    return np.where(np.isfinite(z), z, np.nan).astype(np.float32)


def write_standardised_overview(
    zarr_path: Path,
    offsets: Mapping[str, tuple[int, int]],
    section: Mapping[str, Any],
    store: ErrorSampleStore,
) -> int:
    """Write the group (see module) into the results.zarr at zarr_path, which holds the dh
    overview; offsets: tile id -> (row, col) of its block. Returns the tiles written."""
    if not (Path(zarr_path) / DH_GROUP).is_dir():
        return 0
    target = _create(Path(zarr_path))
    dh: Any = zarr.open_array(str(Path(zarr_path) / DH_GROUP / "dh"), mode="r")
    sigma, centre = sigma_of(section), float(section["centre_m"])
    written = 0
    for tile_id, (row, col) in offsets.items():
        terrain = store.read_terrain(tile_id)
        if terrain is None:
            continue
        rows = slice(row, min(row + terrain.shape[1], dh.shape[0]))
        cols = slice(col, min(col + terrain.shape[2], dh.shape[1]))
        part = terrain[:, : rows.stop - rows.start, : cols.stop - cols.start]
        target[rows, cols] = standardised_block(dh[rows, cols], part, sigma, centre)
        written += 1
    return written


def _create(zarr_path: Path) -> Any:
    """An all-NaN ``z`` like the dh overview (same grid, chunks and CRS); the zarr array."""
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=".*Consolidated metadata.*")
        source = xr.open_zarr(zarr_path, group=DH_GROUP, consolidated=False)
        z = xr.full_like(source["dh"], np.nan).rename("z")
        z.attrs.update(long_name=LONG_NAME, units="1")
        z.encoding = {"_FillValue": np.float32(np.nan), "chunks": source["dh"].encoding["chunks"]}
        z.to_dataset().to_zarr(  # type: ignore[call-overload]
            zarr_path, group=GROUP, mode="w", compute=False, zarr_format=3, consolidated=False
        )
    return zarr.open_array(str(zarr_path / GROUP / "z"), mode="r+")
