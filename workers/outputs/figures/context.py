"""What the figure builders draw from (:class:`FigureContext`), and the readers of a results
folder that fill it: the dh overview (block means down to the figure's size), its CRS, and the
stored job totals."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import Any

import numpy as np
import zarr
from numpy.typing import NDArray
from shapely.geometry.base import BaseGeometry

from demaudit.workers.outputs.figures import compute
from demaudit.workers.outputs.figures.geometry import MapFrame, map_frame
from demaudit.workers.outputs.layout import ALL_PART, OVERVIEW_GROUP, ZARR_NAME
from demaudit.workers.outputs.summary_store import read_job_totals
from demaudit.workers.stats import summary as dhs
from demaudit.workers.stats.merge import ALL

#: the dh map shows at most this many overview pixels a side (block means beyond)
MAP_PIXELS = 700
#: most chunk rows, and most cells (128 MiB as float64), in a band of stored_display_blocks that
#: ends on chunk rows; beyond either, bands are as small as factor allows (chunks read twice)
_BAND_CHUNK_ROWS = 8
_BAND_CELLS = 2**24


@dataclass
class FigureContext:
    """What the builders draw from. ``regions``: (id, name, polygon in ``crs``)."""

    out_dir: Path
    document: Mapping[str, Any]
    overall: dhs.DhSummary | None = None
    strata: Mapping[str, dhs.DhSummary] = field(default_factory=dict)
    regions: Sequence[tuple[str, str, BaseGeometry]] = ()
    crs: str | None = None
    log_counts: bool = True

    @cached_property
    def overview(self) -> tuple[NDArray[np.float64], compute.Bounds] | None:
        """The dh overview (block means down to at most MAP_PIXELS a side) and its extent."""
        return read_overview(self.out_dir)

    @cached_property
    def tile_statistics(self) -> tuple[str, ...]:
        """The tile maps the job's spec asks for (figures.tile_statistics)."""
        return compute.tile_statistics((self.document.get("job") or {}).get("spec"))

    def frame(self, extent: compute.Bounds) -> MapFrame:
        """Units, labels and scale of a map of this extent in the job's CRS."""
        return map_frame(self.crs, extent)

    @property
    def title(self) -> str:
        return str(self.document["job"]["name"])


def _overview_group(out_dir: Path) -> Any:
    return zarr.open_group(str(Path(out_dir) / ZARR_NAME / OVERVIEW_GROUP), mode="r")


def read_overview(out_dir: Path) -> tuple[NDArray[np.float64], compute.Bounds] | None:
    try:
        # read with zarr into this process: through xarray and Dask, the blocks would be
        # computed on whatever cluster the caller has open and shipped back
        group = _overview_group(out_dir)
        dh, x, y = group["dh"], group["x"][...], group["y"][...]
    except (KeyError, FileNotFoundError, OSError):
        return None
    if dh.size == 0:
        return None
    dx = abs(float(x[1] - x[0])) if x.size > 1 else 1.0
    dy = abs(float(y[1] - y[0])) if y.size > 1 else dx
    extent = (
        float(x.min()) - dx / 2,
        float(y.min()) - dy / 2,
        float(x.max()) + dx / 2,
        float(y.max()) + dy / 2,
    )
    factor = max(-(-max(dh.shape) // MAP_PIXELS), 1)  # no more map pixels than the figure shows
    return stored_display_blocks(dh, factor), extent


def stored_display_blocks(array: Any, factor: int) -> NDArray[np.float64]:
    """display_blocks of a stored (zarr) array, read one band of whole chunk rows at a time:
    the memory is one band's, not the whole mosaic's (a national mosaic at 1:8 holds billions
    of cells). The same blocks, each averaged from the same values, as from the whole array.
    A band is a multiple of both the chunk rows and factor where that takes a few chunk rows
    and cells at most (band_rows), so that each chunk is read and decoded once: a band ending
    inside a chunk row reads that row again for the next band (read_overview of a 256-tile
    map: 0.52 s so, 0.34 s with whole chunk rows; issue 13)."""
    band = band_rows(int(array.chunks[0]), factor, width=int(array.shape[1]))
    rows = array.shape[0]
    parts = [
        display_blocks(np.asarray(array[start : start + band]), factor)
        for start in range(0, rows, band)
    ]
    return np.concatenate(parts, axis=0)


def band_rows(rows_per_chunk: int, factor: int, *, width: int) -> int:
    """Rows of a band of stored_display_blocks: a multiple of factor, and of the chunk rows too
    unless that takes more than _BAND_CHUNK_ROWS chunk rows or _BAND_CELLS cells."""
    band = math.lcm(rows_per_chunk, factor)
    if band > _BAND_CHUNK_ROWS * rows_per_chunk or band * width > _BAND_CELLS:
        band = factor * max(1, -(-rows_per_chunk // factor))
    return band


def display_blocks(values: NDArray[np.floating], factor: int) -> NDArray[np.float64]:
    """Mean of the finite values of each factor x factor block, NaN where a block has none
    (edge blocks average what they hold), in float64 whatever the float type of values.

    One strided pass per cell of a block (factor^2 passes over output-sized arrays, the sums in
    the block's row-major order), not numpy's sum over the block axes of a padded 4-D float64
    copy: 2.5x faster (issue 13); the means differ from it by rounding only (tested against
    exact sums). For the map only: no statistic reads them."""
    if factor <= 1:
        return np.asarray(values, dtype=np.float64)
    rows, cols = -(-values.shape[0] // factor), -(-values.shape[1] // factor)
    total = np.zeros((rows, cols))
    count = np.zeros((rows, cols), dtype=np.int64)
    for i in range(factor):
        for j in range(factor):
            part = values[i::factor, j::factor]
            finite = np.isfinite(part)
            height, width = part.shape
            total[:height, :width] += np.where(finite, part, 0.0)
            count[:height, :width] += finite
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(count > 0, total / np.maximum(count, 1), np.nan)


def stored_totals(
    out_dir: Path, document: Mapping[str, Any]
) -> tuple[dhs.DhSummary | None, dict[str, dhs.DhSummary]]:
    """The merged summary and strata of the whole job from results.zarr (None, {} without)."""
    region_ids = [r["region"] for r in document.get("regions", [])]
    try:
        acc = read_job_totals(Path(out_dir) / ZARR_NAME, ALL_PART, region_ids)
    except (KeyError, ValueError, OSError):
        return None, {}
    if acc is None:
        return None, {}
    return acc.overall, acc.strata_of(ALL)


def overview_crs(out_dir: Path) -> str | None:
    try:
        return str(_overview_group(out_dir)["spatial_ref"].attrs["crs_wkt"])
    except (KeyError, FileNotFoundError, OSError):
        return None
