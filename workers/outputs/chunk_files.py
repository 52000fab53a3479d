"""Whole chunks of a local Zarr v3 array written as files, without zarr's asynchronous
store layer (about a millisecond of hand-offs between threads per chunk, more than encoding it;
issue 13). Only for the codec chain the dh overview uses: bytes (little-endian), then zstd. The
files are the ones zarr writes (numcodecs' Zstd with the array's settings: tested byte for byte
against zarr); for another chain, a store that is not a local folder or a window that is not
one whole chunk, write_chunk declines (False) and the caller uses zarr.

Zarr's rules are kept: the regular chunk grid, chunk keys from the array's key encoding, a chunk
at the array's edge stored whole (padded with the fill value), and a chunk holding only the fill
value not stored (its file removed), as zarr does with write_empty_chunks off (its default).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
from numcodecs import Zstd
from numpy.typing import NDArray
from zarr.codecs import BytesCodec, ZstdCodec
from zarr.core.chunk_grids import RegularChunkGrid
from zarr.storage import LocalStore

from demaudit.workers.outputs.folder import write_by_rename

Window = tuple[slice, slice]


def write_chunk(array: Any, window: Window, values: NDArray[Any]) -> bool:
    """Write values as the whole chunk of array (an open zarr array) under window, when the
    window is exactly one chunk (clipped at the array's edge) of a local array with the
    bytes + zstd chain; False (nothing written) otherwise."""
    plan = _plan(array)
    if plan is None or values.shape != (
        window[0].stop - window[0].start,
        window[1].stop - window[1].start,
    ):
        return False
    folder, codec, chunks = plan
    coords = _chunk_of(array.shape, chunks, window)
    if coords is None:
        return False
    path = folder / array.metadata.encode_chunk_key(coords)
    fill = array.metadata.fill_value
    if _only(values, fill):  # zarr stores no chunk that holds only the fill value
        path.unlink(missing_ok=True)
        return True
    whole = np.full(chunks, fill, dtype=array.dtype.newbyteorder("<"))
    whole[: values.shape[0], : values.shape[1]] = values
    path.parent.mkdir(parents=True, exist_ok=True)
    write_by_rename(path, codec.encode(whole))
    return True


def _plan(array: Any) -> tuple[Path, Zstd, tuple[int, int]] | None:
    """(the array's folder, its zstd codec, its chunk shape) when its chunks can be written as
    files here: a 2-D array of a local store, bytes (little-endian) then zstd, regular chunks."""
    metadata = getattr(array, "metadata", None)
    store = getattr(array, "store", None)
    if metadata is None or not isinstance(store, LocalStore) or len(array.shape) != 2:
        return None
    codecs = list(getattr(metadata, "codecs", ()))
    if len(codecs) != 2 or not isinstance(codecs[0], BytesCodec):
        return None
    if codecs[0].endian is not None and codecs[0].endian.value != "little":
        return None
    if not isinstance(codecs[1], ZstdCodec) or not isinstance(
        metadata.chunk_grid, RegularChunkGrid
    ):
        return None
    chunks = tuple(int(c) for c in metadata.chunk_grid.chunk_shape)
    codec = Zstd(level=codecs[1].level, checksum=codecs[1].checksum)
    return Path(store.root) / array.path, codec, (chunks[0], chunks[1])


def _chunk_of(
    shape: tuple[int, ...], chunks: tuple[int, int], window: Window
) -> tuple[int, int] | None:
    """The chunk (row, column) window covers whole (clipped at the array's edge), or None."""
    coords = []
    for axis in (0, 1):
        start, stop, size = window[axis].start, window[axis].stop, chunks[axis]
        if start % size or stop != min(start + size, shape[axis]):
            return None
        coords.append(start // size)
    return coords[0], coords[1]


def _only(values: NDArray[Any], fill: Any) -> bool:
    """Whether every value is the fill value (NaN fill: every value NaN)."""
    if isinstance(fill, float | np.floating) and np.isnan(fill):
        return bool(np.isnan(values).all())
    return bool((values == fill).all())
