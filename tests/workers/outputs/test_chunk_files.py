"""Chunk files written without zarr's store layer are the files zarr itself writes."""

from __future__ import annotations

import os

import numpy as np
import pytest
import zarr
from zarr.codecs import BloscCodec, ZstdCodec
from zarr.storage import LocalStore, MemoryStore

from demaudit.workers.outputs.chunk_files import write_chunk


def _array(path, compressors, shape=(7, 10), chunks=(3, 4)):
    return zarr.create_array(
        LocalStore(str(path)),
        shape=shape,
        chunks=chunks,
        dtype="float32",
        fill_value=np.nan,
        compressors=compressors,
    )


def _files(path):
    found = (f for f in path.rglob("*") if f.is_file())
    return {str(f.relative_to(path)): f.read_bytes() for f in found}


@pytest.mark.parametrize(
    "codec", [ZstdCodec(level=0, checksum=False), ZstdCodec(level=5, checksum=True)]
)
def test_whole_chunks_are_byte_for_byte_what_zarr_writes(tmp_path, codec):
    # interior chunks, chunks clipped at the right and bottom edges (7 x 10 in 3 x 4 chunks),
    # a chunk with some NaN and one with only NaN (zarr stores none: write_empty_chunks off)
    mine, theirs = _array(tmp_path / "mine", codec), _array(tmp_path / "theirs", codec)
    rng = np.random.default_rng(3)
    windows = [
        (slice(r, min(r + 3, 7)), slice(c, min(c + 4, 10))) for r in (0, 3, 6) for c in (0, 4, 8)
    ]
    for k, (rows, cols) in enumerate(windows):
        values = rng.normal(size=(rows.stop - rows.start, cols.stop - cols.start)).astype("float32")
        if k == 1:
            values[0, :2] = np.nan
        if k == 4:
            values[:] = np.nan
        assert write_chunk(mine, (rows, cols), values)
        theirs[rows, cols] = values
    assert _files(tmp_path / "mine") == _files(tmp_path / "theirs")
    assert "c/1/1" not in _files(tmp_path / "mine")  # the NaN-only chunk
    np.testing.assert_array_equal(mine[...], theirs[...])


def test_a_chunk_of_only_nan_removes_the_stored_one(tmp_path):
    array = _array(tmp_path / "a", ZstdCodec(level=0, checksum=False))
    window = (slice(0, 3), slice(0, 4))
    assert write_chunk(array, window, np.ones((3, 4), "float32"))
    assert write_chunk(array, window, np.full((3, 4), np.nan, "float32"))
    assert not (tmp_path / "a" / "c" / "0" / "0").exists()
    assert np.isnan(array[0:3, 0:4]).all()


def test_a_chunk_linked_from_another_store_is_replaced_not_written_through(tmp_path):
    # re-checks hard-link a baseline's chunks into the new store: the baseline must not change
    array = _array(tmp_path / "new", ZstdCodec(level=0, checksum=False))
    window = (slice(0, 3), slice(0, 4))
    assert write_chunk(array, window, np.ones((3, 4), "float32"))
    chunk = tmp_path / "new" / "c" / "0" / "0"
    baseline = tmp_path / "baseline_chunk"
    os.link(chunk, baseline)
    before = baseline.read_bytes()
    assert write_chunk(array, window, np.full((3, 4), 2.0, "float32"))
    assert baseline.read_bytes() == before and chunk.read_bytes() != before
    np.testing.assert_array_equal(array[0:3, 0:4], 2.0)


@pytest.mark.parametrize(
    "window",
    [
        (slice(1, 4), slice(0, 4)),  # not on a chunk's first row
        (slice(0, 3), slice(0, 8)),  # two chunks
        (slice(0, 2), slice(0, 4)),  # part of a chunk
    ],
)
def test_windows_that_are_not_one_whole_chunk_are_left_to_zarr(tmp_path, window):
    array = _array(tmp_path / "a", ZstdCodec(level=0, checksum=False))
    values = np.ones(
        (window[0].stop - window[0].start, window[1].stop - window[1].start), "float32"
    )
    assert not write_chunk(array, window, values)
    assert _files(tmp_path / "a").keys() == {"zarr.json"}


def test_other_codecs_and_stores_are_left_to_zarr(tmp_path):
    window, values = (slice(0, 3), slice(0, 4)), np.ones((3, 4), "float32")
    blosc = _array(tmp_path / "b", BloscCodec(cname="lz4", clevel=1))
    assert not write_chunk(blosc, window, values)
    in_memory = zarr.create_array(
        MemoryStore(), shape=(7, 10), chunks=(3, 4), dtype="float32", fill_value=np.nan
    )
    assert not write_chunk(in_memory, window, values)
