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
_UNSIGNED = frozenset({1, 3, 4, 16})
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
    offsets: NDArray[np.int64]
    counts: NDArray[np.int64]
    tiled: bool = True
    file_size: int = 0

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
    except (ValueError, OSError, struct.error, OverflowError, MemoryError):
        return None  # UncoveredLayoutError is a ValueError; the others from damaged tables


# --- the first image's tags -------------------------------------------------------------------


def block_layout(fd: int) -> BlockLayout:
    """The layout of the first image of the TIFF open at fd; UncoveredLayoutError when outside
    the fast path."""
    tags = _Directory(fd)
    width, height = tags.scalar(256), tags.scalar(257)
    bits = tags.values(258, default=1)
    kind = _SAMPLE_KINDS.get(int(tags.values(339, default=1)[0]))
    compression, predictor = tags.scalar(259, 1), tags.scalar(317, 1)
    if (
        tags.scalar(254, 0) != 0  # a reduced image or a mask
        or tags.scalar(277, 1) != 1  # more than one sample per pixel
        or tags.scalar(266, 1) != 1  # bits of each byte reversed
        or tags.scalar(284, 1) not in (1, 2)
        or tags.scalar(262, 1) == 6  # YCbCr: GDAL refuses one sample of it
        or 338 in tags  # extra samples
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
    tiled = 322 in tags
    if tiled:
        block_width, block_height = tags.scalar(322), tags.scalar(323)
        offsets, counts = tags.values(324, unsigned=True), tags.values(325, unsigned=True)
    else:
        block_width, block_height = width, min(tags.scalar(278, height), height)
        offsets, counts = tags.values(273, unsigned=True), tags.values(279, unsigned=True)
    if min(width, height, block_width, block_height) <= 0:
        raise UncoveredLayoutError("empty image or blocks")
    blocks = -(-width // block_width) * -(-height // block_height)
    if offsets.size != blocks or counts.size != blocks:
        raise UncoveredLayoutError("block tables do not match the image size")
    dtype = np.dtype(f"<{kind}{int(bits[0]) // 8}")
    return BlockLayout(
        width, height, block_width, block_height, dtype, compression, predictor,
        offsets, counts, tiled=tiled, file_size=tags.file_size,
    )  # fmt: skip


class _Directory:
    """The first image file directory of the TIFF open at fd: each tag's type, count and value
    field; a value stored elsewhere in the file is read only when asked for. A tag listed twice
    (libtiff keeps the first, a dict the last) leaves the file to GDAL."""

    def __init__(self, fd: int) -> None:
        self.fd, self.file_size = fd, os.fstat(fd).st_size
        header = self.read(16, 0)
        magic = struct.unpack_from("<H", header, 2)[0]
        if header[:2] != b"II" or magic not in _HEADERS:
            raise UncoveredLayoutError("not a little-endian TIFF")
        if magic == 43 and struct.unpack_from("<HH", header, 4) != (8, 0):
            raise UncoveredLayoutError("not a BigTIFF")
        offset_at, self.offset_format, count_format, entry_format = _HEADERS[magic]
        where = struct.unpack_from(self.offset_format, header, offset_at)[0]
        entry_size, count_size = struct.calcsize(entry_format), struct.calcsize(count_format)
        n = struct.unpack(count_format, self.read(count_size, where))[0]
        if not 0 < n <= _MAX_ENTRIES:
            raise UncoveredLayoutError("implausible directory")
        table = self.read(n * entry_size, where + count_size)
        self.entries: dict[int, tuple[int, int, bytes]] = {}
        for i in range(n):
            tag, kind, count, field = struct.unpack_from(entry_format, table, i * entry_size)
            if tag in self.entries:
                raise UncoveredLayoutError(f"TIFF tag {tag} listed twice")
            self.entries[tag] = (kind, count, field)

    def __contains__(self, tag: int) -> bool:
        return tag in self.entries

    def values(
        self, tag: int, *, default: int | None = None, unsigned: bool = False
    ) -> NDArray[np.int64]:
        """The tag's integers (``default`` alone when it is missing and a default is given)."""
        if tag not in self.entries:
            if default is None:
                raise UncoveredLayoutError(f"TIFF tag {tag} missing")
            return np.array([default], dtype=np.int64)
        kind, count, field = self.entries[tag]
        if kind not in _INTEGER_TYPES or count == 0 or (unsigned and kind not in _UNSIGNED):
            raise UncoveredLayoutError(f"TIFF tag {tag} is not of an integer type it may have")
        size = _TYPE_SIZES[kind] * count
        data = field[:size] if size <= len(field) else self.read(size, self._offset(field))
        values = np.frombuffer(data, dtype=np.dtype(_INTEGER_TYPES[kind]).newbyteorder("<"))
        if kind == 16 and values.size and int(values.max()) >= 2**62:
            raise UncoveredLayoutError(f"TIFF tag {tag} points beyond any file")
        return values.astype(np.int64)

    def scalar(self, tag: int, default: int | None = None) -> int:
        """The tag's one integer (a count other than one leaves the file to GDAL)."""
        if tag in self.entries and self.entries[tag][1] != 1:
            raise UncoveredLayoutError(f"TIFF tag {tag} holds {self.entries[tag][1]} values")
        return int(self.values(tag, default=default)[0])

    def read(self, size: int, offset: int) -> bytes:
        return _pread(self.fd, size, offset, self.file_size)

    def _offset(self, field: bytes) -> int:
        return int(struct.unpack(self.offset_format, field)[0])


def _pread(fd: int, size: int, offset: int, file_size: int) -> bytes:
    """size bytes at offset; UncoveredLayoutError when they do not all lie in the file (checked
    before reading: a damaged count never asks for more memory than the file holds)."""
    if offset < 0 or size < 0 or offset + size > file_size:
        raise UncoveredLayoutError("the file ends inside its own tables")
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
        return _pread(fd, size, offset, layout.file_size)
    import deflate

    try:
        raw = deflate.zlib_decompress(_pread(fd, count, offset, layout.file_size), size)
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
    """The numpy twin of tiff_kernels.float_predictor_sweep for a whole block: its samples as
    native unsigned ints of nb bytes (the tests hold the compiled sweep to it)."""
    planes = np.cumsum(np.frombuffer(raw, np.uint8).reshape(-1, nb * bw), axis=1, dtype=np.uint8)
    planes = planes.reshape(-1, nb, bw).transpose(0, 2, 1)  # per sample: most significant first
    if np.little_endian:
        planes = planes[:, :, ::-1]
    return np.ascontiguousarray(planes).view(f"=u{nb}")[:, :, 0]
