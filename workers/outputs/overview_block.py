"""One tile's block of the dh overview mosaic in results.zarr: where it goes (a small picklable
value the client hands to the tile task) and the write itself, done by the worker that made the
block or, when that failed, by the client (workers/outputs/writers.py)."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import zarr
from numpy.typing import NDArray

from demaudit.workers.outputs.chunk_files import write_chunk
from demaudit.workers.outputs.open_nodes import opened


@dataclass(frozen=True)
class OverviewTarget:
    """The overview array (path of the zarr array) and the tile block's place in the mosaic:
    first row and column, and the mosaic's size (blocks at its edge are clipped)."""

    array_path: str
    row: int
    col: int
    height: int
    width: int

    def window(self, shape: tuple[int, ...]) -> tuple[slice, slice]:
        """Rows and columns of the mosaic a block of ``shape`` covers (clipped to it)."""
        rows = slice(self.row, min(self.row + shape[0], self.height))
        cols = slice(self.col, min(self.col + shape[1], self.width))
        return rows, cols


def write_block(array: Any, target: OverviewTarget, block: NDArray[np.float32]) -> None:
    """Write block into the overview array (an open zarr array) at target's window; only the
    chunks under the window are written (the mosaic is chunked one tile block a chunk): as a
    chunk file where the window is one whole chunk (chunk_files), else through zarr."""
    rows, cols = target.window(block.shape)
    values = block[: rows.stop - rows.start, : cols.stop - cols.start]
    if not write_chunk(array, (rows, cols), values):
        array[rows, cols] = values


def store_block(target: OverviewTarget, block: NDArray[np.float32]) -> None:
    """Open the overview array (r+: a store removed meanwhile is not made again; kept open by
    the worker, see open_nodes) and write block; raises what zarr raises when the store is gone
    or cannot be written."""
    array = opened(
        "overview",
        target.array_path,
        lambda: zarr.open_array(target.array_path, mode="r+", use_consolidated=False),
    )
    write_block(array, target, block)
