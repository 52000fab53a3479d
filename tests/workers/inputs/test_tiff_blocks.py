"""Reading bands without GDAL (workers/inputs/tiff_blocks.py), held to GDAL itself: files that
GDAL writes in every covered layout must read to the same bits as rasterio reads them (GDAL is
the reference library here), windows included; files outside the fast path, and damaged files,
must be left to GDAL (None), never read to other values."""

from __future__ import annotations

import os
import struct
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import rasterio
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from rasterio.shutil import copy as rio_copy
from rasterio.transform import from_origin

from demaudit.workers.inputs import tiff_kernels
from demaudit.workers.inputs.tiff_blocks import (
    _Directory,
    block_layout,
    read_band,
    undo_float_predictor,
)
from demaudit.workers.tile import kernels

pytestmark = pytest.mark.skipif(not kernels.AVAILABLE, reason="the fast path needs numba")

SHAPE = (45, 37)  # neither a multiple of 16 nor of the strips' heights


def _values(dtype: str, rng: np.random.Generator) -> np.ndarray:
    if np.dtype(dtype).kind == "f":
        data = rng.normal(350.0, 80.0, SHAPE).astype(dtype)
        data[3, 4], data[10, :5] = np.nan, -9999.0  # nodata codes and NaN travel bit for bit
        return data
    info = np.iinfo(dtype)
    return rng.integers(info.min, info.max, SHAPE, endpoint=True).astype(dtype)


def _write(path: Path, data: np.ndarray, **options: Any) -> Path:
    profile = {
        "driver": "GTiff",
        "height": data.shape[0],
        "width": data.shape[1],
        "count": 1,
        "dtype": str(data.dtype),
        "crs": "EPSG:32632",
        "transform": from_origin(480_000.0, 6_190_000.0, 5.0, 5.0),
    }
    with rasterio.open(path, "w", **(profile | options)) as dst:
        dst.write(data, 1)
    return path


def _gdal(path: Path, window: tuple[int, int, int, int] | None = None) -> np.ndarray:
    with rasterio.open(path) as src:
        if window is None:
            return src.read(1)
        r, c, h, w = window
        return src.read(1, window=((r, r + h), (c, c + w)))


def _fast(path: Path, window: tuple[int, int, int, int] | None = None) -> np.ndarray | None:
    fd = os.open(path, os.O_RDONLY)
    try:
        return read_band(fd, SHAPE, window)
    finally:
        os.close(fd)


def _same_bits(a: np.ndarray, b: np.ndarray) -> bool:
    return a.dtype == b.dtype and a.shape == b.shape and a.tobytes() == b.tobytes()


LAYOUTS = [
    {"tiled": True, "blockxsize": 16, "blockysize": 16},
    {"tiled": True, "blockxsize": 32, "blockysize": 48},
    {"blockysize": 1},
    {"blockysize": 7},
    {},  # GDAL's default strips
    {"tiled": True, "blockxsize": 16, "blockysize": 16, "BIGTIFF": "YES"},
]
CODINGS = [
    ("uint8", {}),
    ("int8", {"compress": "deflate", "predictor": 2}),
    ("int16", {"compress": "deflate", "predictor": 2}),
    ("uint16", {"compress": "deflate"}),
    ("int32", {"compress": "deflate", "predictor": 2}),
    ("uint32", {}),
    ("float32", {"compress": "deflate", "predictor": 3}),
    ("float32", {"compress": "deflate", "predictor": 3, "zlevel": 1}),
    ("float32", {"compress": "deflate"}),
    ("float32", {}),
    ("float64", {"compress": "deflate", "predictor": 3}),
    ("float64", {"compress": "deflate", "predictor": 2}),
]


@pytest.mark.parametrize("layout", LAYOUTS, ids=lambda o: "-".join(f"{k}{v}" for k, v in o.items()))
@pytest.mark.parametrize("dtype,coding", CODINGS, ids=lambda x: str(x))
def test_gdal_s_files_read_to_gdal_s_bits(tmp_path, dtype, coding, layout):
    data = _values(dtype, np.random.default_rng(7))
    path = _write(tmp_path / "t.tif", data, **coding, **layout)
    fast = _fast(path)
    assert fast is not None, "a covered layout must not fall back to GDAL"
    assert _same_bits(fast, _gdal(path))
    for window in [(0, 0, 1, 1), (44, 36, 1, 1), (5, 3, 20, 30), (0, 17, 45, 20), (31, 0, 14, 37)]:
        assert _same_bits(_fast(path, window), _gdal(path, window)), window


@settings(
    max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(
    r=st.integers(0, SHAPE[0] - 1),
    c=st.integers(0, SHAPE[1] - 1),
    h=st.integers(1, SHAPE[0]),
    w=st.integers(1, SHAPE[1]),
)
def test_any_window_reads_as_gdal_reads_it(tmp_path, r, c, h, w):
    h, w = min(h, SHAPE[0] - r), min(w, SHAPE[1] - c)
    path = tmp_path / "w.tif"
    if not path.exists():
        options = {"compress": "deflate", "predictor": 3, "tiled": True, "blockxsize": 16}
        _write(path, _values("float32", np.random.default_rng(3)), blockysize=16, **options)
    assert _same_bits(_fast(path, (r, c, h, w)), _gdal(path, (r, c, h, w)))


@pytest.mark.parametrize(
    "options",
    [
        {"compress": "lzw", "predictor": 3},
        {"compress": "zstd"},
        {"ENDIANNESS": "BIG"},
        {"compress": "deflate", "predictor": 3, "ENDIANNESS": "BIG"},
    ],
    ids=str,
)
def test_layouts_outside_the_fast_path_are_left_to_gdal(tmp_path, options):
    path = _write(tmp_path / "o.tif", _values("float32", np.random.default_rng(1)), **options)
    assert _fast(path) is None


def test_two_bands_a_sparse_file_and_another_size_are_left_to_gdal(tmp_path):
    data = _values("float32", np.random.default_rng(2))
    two = tmp_path / "two.tif"
    with rasterio.open(
        two, "w", driver="GTiff", height=SHAPE[0], width=SHAPE[1], count=2, dtype="float32"
    ) as dst:
        dst.write(np.stack([data, data]))
    assert _fast(two) is None
    sparse = tmp_path / "sparse.tif"
    with rasterio.open(
        sparse, "w", driver="GTiff", height=SHAPE[0], width=SHAPE[1], count=1, dtype="float32",
        tiled=True, blockxsize=16, blockysize=16, SPARSE_OK="TRUE", nodata=-9999.0,
    ) as dst:  # fmt: skip
        dst.write(data[:16, :16], 1, window=((0, 16), (0, 16)))  # the other blocks never written
    assert _fast(sparse) is None
    assert _fast(sparse, (0, 0, 16, 16)) is not None  # a window of written blocks only
    fd = os.open(_write(tmp_path / "n.tif", data), os.O_RDONLY)
    try:
        assert read_band(fd, (SHAPE[0] + 1, SHAPE[1])) is None  # not the size the catalog saw
        assert read_band(fd, SHAPE, (40, 0, 10, 5)) is None  # a window beyond the band
    finally:
        os.close(fd)


def test_damaged_files_are_left_to_gdal(tmp_path):
    data = _values("float32", np.random.default_rng(4))
    options = {"compress": "deflate", "predictor": 3, "tiled": True}
    path = _write(tmp_path / "d.tif", data, blockxsize=16, blockysize=16, **options)
    raw = bytearray(path.read_bytes())
    fd = os.open(path, os.O_RDONLY)
    try:
        layout = block_layout(fd)
    finally:
        os.close(fd)
    offset, count = int(layout.offsets[4]), int(layout.counts[4])
    garbled = raw.copy()
    garbled[offset + 2 : offset + count] = bytes(range(256)) * ((count - 2) // 256) + bytes(
        (count - 2) % 256
    )
    (tmp_path / "garbled.tif").write_bytes(garbled)
    (tmp_path / "short.tif").write_bytes(raw[: offset + count // 2])
    (tmp_path / "header.tif").write_bytes(raw[:10])
    for name in ("garbled.tif", "short.tif", "header.tif"):
        assert _fast(tmp_path / name) is None, name


@pytest.mark.parametrize("nb", [4, 8])
def test_compiled_float_predictor_matches_its_numpy_twin(nb):
    rng = np.random.default_rng(nb)
    bw, rows = 24, 9
    raw = rng.integers(0, 256, rows * nb * bw, dtype=np.uint8).tobytes()
    whole = undo_float_predictor(raw, nb, bw)
    out = np.zeros((rows + 2, bw + 3), dtype=f"=u{nb}")
    tiff_kernels.float_predictor_sweep(np.frombuffer(raw, np.uint8), nb, bw, rows, bw, out, 1, 2)
    assert np.array_equal(out[1 : rows + 1, 2 : bw + 2], whole)
    part = np.zeros((4, 7), dtype=f"=u{nb}")
    tiff_kernels.float_predictor_sweep(np.frombuffer(raw, np.uint8), nb, bw, 4, 7, part, 0, 0)
    assert np.array_equal(part, whole[:4, :7])


@pytest.mark.parametrize("predictor", ["FLOATING_POINT", "NO"])
def test_cloud_optimised_geotiffs_with_overviews_and_block_leaders_read_to_gdal_s_bits(
    tmp_path, predictor
):
    # GDAL's COG driver puts the overviews' directories first, a 4-byte size before each block
    # and the last 4 bytes again after it: the first directory's offsets still point at the data
    data = _values("float32", np.random.default_rng(5))
    plain = _write(tmp_path / "plain.tif", data, nodata=-9999.0)
    cog = tmp_path / "cog.tif"
    rio_copy(
        plain, cog, driver="COG", COMPRESS="DEFLATE", PREDICTOR=predictor, BLOCKSIZE=16,
        OVERVIEW_COUNT=2,
    )  # fmt: skip
    with rasterio.open(cog) as src:
        assert src.overviews(1), "the file must have overviews for this test to mean anything"
    fast = _fast(cog)
    assert fast is not None and _same_bits(fast, _gdal(cog))
    assert _same_bits(_fast(cog, (7, 9, 20, 21)), _gdal(cog, (7, 9, 20, 21)))


def test_tiles_as_wide_as_the_band_are_tiles_not_strips(tmp_path):
    # 48-px wide band in 48 x 16 tiles: the last tile row is whole in the file, not cut
    data = np.random.default_rng(6).normal(0.0, 9.0, (45, 48)).astype("float32")
    for coding in ({}, {"compress": "deflate", "predictor": 3}):
        blocks = {"tiled": True, "blockxsize": 48, "blockysize": 16}
        path = _write(tmp_path / "wide.tif", data, **blocks, **coding)
        fd = os.open(path, os.O_RDONLY)
        try:
            fast = read_band(fd, data.shape)
        finally:
            os.close(fd)
        assert fast is not None and _same_bits(fast, _gdal(path)), coding


def test_a_predictor_tag_on_an_uncompressed_file_is_left_to_gdal(tmp_path):
    # libtiff applies a predictor only with a codec that has one: without compression the tag
    # is ignored, and undoing it here would change every value. Planar configuration (284, 1)
    # is rewritten as Predictor (317) = 2 in the file's one directory.
    data = np.random.default_rng(8).integers(-500, 500, SHAPE).astype("int16")
    path = _write(tmp_path / "p.tif", data)
    raw = bytearray(path.read_bytes())
    ifd = int.from_bytes(raw[4:8], "little")
    for i in range(int.from_bytes(raw[ifd : ifd + 2], "little")):
        at = ifd + 2 + 12 * i
        if int.from_bytes(raw[at : at + 2], "little") == 284:
            raw[at : at + 2] = (317).to_bytes(2, "little")
            raw[at + 8 : at + 10] = (2).to_bytes(2, "little")
    path.write_bytes(bytes(raw))
    assert block_layout_predictor(path) == 2  # the rewrite took
    fast = _fast(path)
    assert fast is None or _same_bits(fast, _gdal(path))
    assert _same_bits(_gdal(path), data)  # GDAL ignores the tag


def block_layout_predictor(path: Path) -> int:
    fd = os.open(path, os.O_RDONLY)
    try:
        return int(_Directory(fd).scalar(317))
    finally:
        os.close(fd)


def _rewrite_entry(path: Path, tag: int, entry: tuple[int, int, int, bytes]) -> None:
    """Overwrite the directory entry of ``tag`` in a classic little-endian TIFF with entry =
    (tag, type, count, 4-byte value field)."""
    raw = bytearray(path.read_bytes())
    ifd = struct.unpack_from("<I", raw, 4)[0]
    for i in range(struct.unpack_from("<H", raw, ifd)[0]):
        at = ifd + 2 + 12 * i
        if struct.unpack_from("<H", raw, at)[0] == tag:
            struct.pack_into("<HHI4s", raw, at, *entry)
            path.write_bytes(bytes(raw))
            return
    raise AssertionError(f"tag {tag} not in the file")


SHORT, LONG, SLONG, DOUBLE = 3, 4, 9, 12
HAND_MADE = {
    # libtiff reverses each byte's bits; the values would differ
    "fill order 2": (284, (266, SHORT, 1, struct.pack("<HH", 2, 0))),
    # a second SampleFormat (unsigned) before the real one (signed): libtiff keeps the first
    "a tag listed twice": (284, (339, SHORT, 1, struct.pack("<HH", 1, 0))),
    "YCbCr with one sample": (262, (262, SHORT, 1, struct.pack("<HH", 6, 0))),
    "extra samples": (284, (338, SHORT, 1, struct.pack("<HH", 0, 0))),
    "a width of two values": (256, (256, SHORT, 2, struct.pack("<HH", 37, 37))),
    "negative strip offsets": (273, (273, SLONG, 1, struct.pack("<i", -1))),
}


@pytest.mark.parametrize("case", HAND_MADE, ids=str)
def test_hand_made_directories_are_left_to_gdal(tmp_path, case):
    # found by review: each made the reader return other values than GDAL, or raise
    data = np.random.default_rng(9).integers(-500, 500, SHAPE).astype("int16")
    path = _write(tmp_path / "h.tif", data, blockysize=SHAPE[0])  # one strip: one offset
    tag, entry = HAND_MADE[case]
    _rewrite_entry(path, tag, entry)
    assert _fast(path) is None


def test_a_damaged_count_never_asks_for_more_memory_than_the_file_holds(tmp_path):
    # a tag the reader does not use, with 2**30 doubles "elsewhere in the file": GDAL reads the
    # file; so does the reader, without reading that tag (it raised MemoryError before)
    data = np.random.default_rng(10).integers(-500, 500, SHAPE).astype("int16")
    path = _write(tmp_path / "m.tif", data)
    _rewrite_entry(path, 284, (65000, DOUBLE, 2**30, struct.pack("<I", 8)))
    fast = _fast(path)
    assert fast is not None and _same_bits(fast, _gdal(path))
    big = _write(tmp_path / "b.tif", data, BIGTIFF="YES")
    raw = bytearray(big.read_bytes())
    raw[8:16] = struct.pack("<Q", 2**63 + 5)  # the first directory beyond any file
    big.write_bytes(bytes(raw))
    assert _fast(big) is None


def test_flipped_bytes_in_the_blocks_never_read_to_other_values_than_gdal_s(tmp_path):
    # adversarial: 300 copies of a DEFLATE float file with 1-3 bytes of its blocks changed. The
    # reader may leave a file to GDAL (None) but must never return values GDAL would not
    data = _values("float32", np.random.default_rng(11))
    options = {"compress": "deflate", "predictor": 3, "tiled": True}
    path = _write(tmp_path / "f.tif", data, blockxsize=16, blockysize=16, **options)
    raw = path.read_bytes()
    fd = os.open(path, os.O_RDONLY)
    try:
        layout = block_layout(fd)
    finally:
        os.close(fd)
    first, end = int(layout.offsets.min()), int((layout.offsets + layout.counts).max())
    rng = np.random.default_rng(12)
    damaged = tmp_path / "d.tif"
    for _ in range(300):
        changed = bytearray(raw)
        for at in rng.integers(first, end, rng.integers(1, 4)):
            changed[at] ^= int(rng.integers(1, 256))
        damaged.write_bytes(bytes(changed))
        fast = _fast(damaged)
        if fast is None:
            continue
        try:
            gdal = _gdal(damaged)
        except rasterio.errors.RasterioError:
            raise AssertionError("values read where GDAL refuses the file") from None
        assert _same_bits(fast, gdal)
