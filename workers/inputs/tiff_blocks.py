"""Reading a tile's band without GDAL, for the layout DEM tiles are commonly written in.

GDAL (through libtiff) spends most of a DEFLATE float32 tile's read outside the inflate itself:
undoing the floating-point predictor byte by byte, its block cache and copies. Here the blocks are
inflated by libdeflate (the ``deflate`` package) straight into the band, and the predictor undone
by one compiled sweep (workers/inputs/tiff_kernels.py); benchmarks/RESULTS.md has the measured cost.

Covered ("the fast path"):

- classic TIFF or BigTIFF, little-endian; the first image of the file, a full-resolution one;
- one sample per pixel of 8, 16, 32 or 64 bits: unsigned or signed integers, or floats of 32 or
  64 bits;
- no compression or DEFLATE (codes 8 and 32946); no predictor, horizontal differencing (2) or
  the floating-point predictor (3, floats only);
- strips or tiles, every block a read touches present (no sparse blocks).

Anything else returns None (:func:`read_band`) and the caller reads with GDAL, as it does when a
covered file turns out not to decode to exactly the expected bytes: GDAL's values and error
messages stay the reference (tests/workers/inputs/test_tiff_blocks.py holds both to the same bits
on files GDAL wrote in every covered layout, and to GDAL's behaviour on damaged ones).
"""

from __future__ import annotations

import os
import struct
from dataclasses import dataclass
from importlib.util import find_spec

import numpy as np
from numpy.typing import NDArray

from demaudit.workers.inputs import tiff_kernels
from demaudit.workers.tile import kernels

__all__ = ["BlockLayout", "UncoveredLayoutError", "block_layout", "read_band", "read_window"]

#: (row offset, column offset, rows, columns) of a read, in pixels of the band.
Window = tuple[int, int, int, int]

_INFLATE = find_spec("deflate") is not None
_DEFLATE_CODES = (8, 32946)
_INTEGER_TYPES = {1: "u1", 3: "u2", 4: "u4", 16: "u8", 6: "i1", 8: "i2", 9: "i4", 17: "i8"}
_TYPE_SIZES = {1: 1, 2: 1, 3: 2, 4: 4, 5: 8, 6: 1, 7: 1, 8: 2, 9: 4, 10: 8, 11: 4, 12: 8}
_TYPE_SIZES |= {13: 4, 16: 8, 17: 8, 18: 8}
_SAMPLE_KINDS = {1: "u", 2: "i", 3: "f"}
_MAX_ENTRIES = 4096
#: TIFF (42) and BigTIFF (43): where the first directory's offset is and its format, the format of
#: a directory's entry count and of one entry (tag, type, count, value or offset).
_HEADERS = {42: (4, "<I", "<H", "<HHI4s"), 43: (8, "<Q", "<Q", "<HHQ8s")}


class UncoveredLayoutError(ValueError):
    """The file is outside the fast path (or does not decode as its tags say): read it with
    GDAL."""


@dataclass(frozen=True)
class BlockLayout:
    """How the first image of a TIFF is stored: its size, its blocks (tiles, or strips as blocks
    one band wide), the samples' type and the compression and predictor of every block."""

    width: int
    height: int
    block_width: int
    block_height: int
    dtype: np.dtype
    compression: int
    predictor: int
    offsets: NDArray[np.uint64]
    counts: NDArray[np.uint64]
    tiled: bool = True

    @property
    def blocks_across(self) -> int:
        return -(-self.width // self.block_width)

    def block_rows(self, row: int) -> int:
        """Rows a decoded block of block row ``row`` holds: a tile is always whole; the last
        strip stops at the band's last row."""
        if self.tiled:
            return self.block_height
        return min(self.block_height, self.height - row * self.block_height)


def read_band(fd: int, shape: tuple[int, int], window: Window | None = None) -> NDArray | None:
    """Band 1 of the TIFF open at fd (or a window of it) as GDAL would read it, or None when the
    file is outside the fast path or does not decode here (the caller then asks GDAL). ``shape``
    is the (rows, columns) the catalog recorded: a file that no longer has it is left to GDAL."""
    if not kernels.AVAILABLE:
        return None
    try:
        layout = block_layout(fd)
        if (layout.height, layout.width) != shape:
            return None
        return read_window(fd, layout, window or (0, 0, shape[0], shape[1]))
    except (ValueError, OSError, struct.error):  # UncoveredLayoutError is a ValueError
        return None


# --- the first image's tags -------------------------------------------------------------------


def block_layout(fd: int) -> BlockLayout:
    """The layout of the first image of the TIFF open at fd; UncoveredLayoutError when outside
    the fast path."""
    tags = _first_directory(fd)
    width, height = _scalar(tags, 256), _scalar(tags, 257)
    bits = _values(tags, 258, default=1)
    kind = _SAMPLE_KINDS.get(int(_values(tags, 339, default=1)[0]))
    compression, predictor = _scalar(tags, 259, 1), _scalar(tags, 317, 1)
    if (
        _scalar(tags, 254, 0) != 0  # a reduced image or a mask
        or _scalar(tags, 277, 1) != 1  # more than one sample per pixel
        or len(set(bits.tolist())) != 1
        or int(bits[0]) not in (8, 16, 32, 64)
        or kind is None
        or (kind == "f" and int(bits[0]) < 32)
        or compression not in (1, *_DEFLATE_CODES)
        or (compression != 1 and not _INFLATE)
        or predictor not in (1, 2, 3)
        or (predictor == 3 and kind != "f")
        or (predictor != 1 and compression == 1)  # libtiff ignores a predictor there
    ):
        raise UncoveredLayoutError("not a layout read without GDAL")
    if 322 in tags:
        block_width, block_height = _scalar(tags, 322), _scalar(tags, 323)
        offsets, counts = _values(tags, 324), _values(tags, 325)
    else:
        block_width, block_height = width, min(_scalar(tags, 278, height), height)
        offsets, counts = _values(tags, 273), _values(tags, 279)
    if min(width, height, block_width, block_height) <= 0:
        raise UncoveredLayoutError("empty image or blocks")
    blocks = -(-width // block_width) * -(-height // block_height)
    if offsets.size != blocks or counts.size != blocks:
        raise UncoveredLayoutError("block tables do not match the image size")
    dtype = np.dtype(f"<{kind}{int(bits[0]) // 8}")
    return BlockLayout(
        width, height, block_width, block_height, dtype, compression, predictor,
        offsets.astype(np.uint64), counts.astype(np.uint64), tiled=322 in tags,
    )  # fmt: skip


def _first_directory(fd: int) -> dict[int, tuple[int, int, bytes]]:
    """Tag -> (type, count, value field) of the first image file directory."""
    header = _pread(fd, 16, 0)
    if header[:2] != b"II":
        raise UncoveredLayoutError("not a little-endian TIFF")
    magic = struct.unpack_from("<H", header, 2)[0]
    if magic not in _HEADERS or (magic == 43 and struct.unpack_from("<HH", header, 4) != (8, 0)):
        raise UncoveredLayoutError("not a TIFF")
    offset_at, offset_format, count_format, entry_format = _HEADERS[magic]
    where = struct.unpack_from(offset_format, header, offset_at)[0]
    entry_size = struct.calcsize(entry_format)
    count_size = struct.calcsize(count_format)
    n = struct.unpack(count_format, _pread(fd, count_size, where))[0]
    if not 0 < n <= _MAX_ENTRIES:
        raise UncoveredLayoutError("implausible directory")
    table = _pread(fd, n * entry_size, where + count_size)
    tags: dict[int, tuple[int, int, bytes]] = {}
    for i in range(n):
        tag, kind, count, field = struct.unpack_from(entry_format, table, i * entry_size)
        size = _TYPE_SIZES.get(kind, 0) * count
        if size <= len(field):
            data = field[:size]
        else:
            data = _pread(fd, size, struct.unpack(offset_format, field)[0])
        tags[tag] = (kind, count, data)
    return tags


def _values(
    tags: dict[int, tuple[int, int, bytes]], tag: int, *, default: int | None = None
) -> NDArray[np.int64]:
    if tag not in tags:
        if default is None:
            raise UncoveredLayoutError(f"TIFF tag {tag} missing")
        return np.array([default], dtype=np.int64)
    kind, count, data = tags[tag]
    if kind not in _INTEGER_TYPES or count == 0:
        raise UncoveredLayoutError(f"TIFF tag {tag} is not an integer")
    return np.frombuffer(data, dtype=np.dtype(_INTEGER_TYPES[kind]).newbyteorder("<")).astype(
        np.int64
    )


def _scalar(tags: dict[int, tuple[int, int, bytes]], tag: int, default: int | None = None) -> int:
    return int(_values(tags, tag, default=default)[0])


def _pread(fd: int, size: int, offset: int) -> bytes:
    data = os.pread(fd, size, offset)
    if len(data) != size:
        raise UncoveredLayoutError("the file ends inside its own tables")
    return data


# --- blocks -----------------------------------------------------------------------------------


def read_window(fd: int, layout: BlockLayout, window: Window) -> NDArray:
    """The window (row offset, column offset, rows, columns) of the band, decoding only the
    blocks it touches; UncoveredLayoutError when a block is missing or decodes to other than its
    size."""
    row0, col0, rows, cols = window
    if rows <= 0 or cols <= 0 or row0 < 0 or col0 < 0:
        raise UncoveredLayoutError("empty window")
    if row0 + rows > layout.height or col0 + cols > layout.width:
        raise UncoveredLayoutError("window beyond the band")
    out = np.empty((rows, cols), dtype=layout.dtype.newbyteorder("="))
    bh, bw = layout.block_height, layout.block_width
    for by in range(row0 // bh, (row0 + rows - 1) // bh + 1):
        for bx in range(col0 // bw, (col0 + cols - 1) // bw + 1):
            top, left = by * bh, bx * bw
            block_rows = (max(row0 - top, 0), min(row0 + rows - top, layout.block_rows(by)))
            block_cols = (max(col0 - left, 0), min(col0 + cols - left, bw))
            raw = _block_bytes(fd, layout, by * layout.blocks_across + bx, layout.block_rows(by))
            target = (top + block_rows[0] - row0, left + block_cols[0] - col0)
            _decode_into(raw, layout, block_rows, block_cols, out, target)
    return out


def _block_bytes(fd: int, layout: BlockLayout, index: int, block_rows: int) -> bytes | bytearray:
    """The decompressed bytes of one block (predictor not yet undone)."""
    size = block_rows * layout.block_width * layout.dtype.itemsize
    offset, count = int(layout.offsets[index]), int(layout.counts[index])
    if count == 0 or offset == 0:
        raise UncoveredLayoutError("sparse block")  # GDAL fills it with nodata
    if layout.compression == 1:
        if count < size:
            raise UncoveredLayoutError("short block")
        return _pread(fd, size, offset)
    import deflate

    try:
        raw = deflate.zlib_decompress(_pread(fd, count, offset), size)
    except deflate.DeflateError as exc:
        raise UncoveredLayoutError(f"block {index} does not inflate: {exc}") from None
    if len(raw) != size:
        raise UncoveredLayoutError(f"block {index} inflates to {len(raw)} bytes, not {size}")
    return raw


def _decode_into(
    raw: bytes | bytearray,
    layout: BlockLayout,
    rows: tuple[int, int],
    cols: tuple[int, int],
    out: NDArray,
    target: tuple[int, int],
) -> None:
    """Undo the block's predictor and copy its rows[0]:rows[1], cols[0]:cols[1] into out at
    target."""
    nb, bw = layout.dtype.itemsize, layout.block_width
    dest = out[target[0] : target[0] + rows[1] - rows[0], target[1] : target[1] + cols[1] - cols[0]]
    if layout.predictor == 3:
        as_bytes, sweep = np.frombuffer(raw, dtype=np.uint8), tiff_kernels.float_predictor_sweep
        if rows[0] == 0 and cols[0] == 0:  # straight into out (every block of a whole band)
            sweep(as_bytes, nb, bw, rows[1], cols[1], out.view(f"=u{nb}"), *target)
            return
        scratch = np.empty((rows[1], cols[1]), dtype=f"=u{nb}")  # a window's edge cuts it
        sweep(as_bytes, nb, bw, rows[1], cols[1], scratch, 0, 0)
        dest[...] = scratch[rows[0] :, cols[0] :].view(dest.dtype)
        return
    block = np.frombuffer(raw, dtype=layout.dtype).reshape(-1, bw)[rows[0] : rows[1]]
    if layout.predictor == 2:  # horizontal differencing: running sums wrap as the samples' ints
        unsigned = block.view(f"<u{nb}")[:, : cols[1]]
        block = np.cumsum(unsigned, axis=1, dtype=unsigned.dtype).view(layout.dtype)
    dest[...] = block[:, cols[0] : cols[1]]


def undo_float_predictor(raw: bytes | bytearray, nb: int, bw: int) -> NDArray:
    """The numpy twin of kernels.float_predictor_sweep for a whole block: its samples as
    native unsigned ints of nb bytes (the tests hold the compiled sweep to it)."""
    planes = np.cumsum(np.frombuffer(raw, np.uint8).reshape(-1, nb * bw), axis=1, dtype=np.uint8)
    planes = planes.reshape(-1, nb, bw).transpose(0, 2, 1)  # per sample: most significant first
    if np.little_endian:
        planes = planes[:, :, ::-1]
    return np.ascontiguousarray(planes).view(f"=u{nb}")[:, :, 0]
