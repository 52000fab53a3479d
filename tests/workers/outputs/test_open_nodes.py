"""Worker-side zarr nodes kept open: reused while their metadata file stays, never written once
their store is removed, opened again when the store is made anew."""

from __future__ import annotations

import shutil

import numpy as np
import pytest
import zarr

from demaudit.workers.outputs.open_nodes import opened
from demaudit.workers.outputs.overview_block import OverviewTarget, store_block


def _array(path, fill):
    zarr.create_array(str(path), shape=(4, 4), chunks=(2, 2), dtype="float32", fill_value=fill)
    return str(path)


def test_a_node_is_opened_once_while_its_metadata_stays(tmp_path):
    path = _array(tmp_path / "a.zarr", 0.0)
    calls = []

    def open_node():
        calls.append(1)
        return zarr.open_array(path, mode="r+")

    first = opened("test", path, open_node)
    assert opened("test", path, open_node) is first and len(calls) == 1


def test_a_removed_store_is_not_made_again(tmp_path):
    path = _array(tmp_path / "a.zarr", 0.0)
    target = OverviewTarget(path, 0, 0, 4, 4)
    store_block(target, np.ones((2, 2), np.float32))
    shutil.rmtree(path)
    with pytest.raises(FileNotFoundError):
        store_block(target, np.ones((2, 2), np.float32))
    assert not (tmp_path / "a.zarr").exists()


def test_a_store_made_anew_is_opened_again(tmp_path):
    path = _array(tmp_path / "a.zarr", 0.0)
    target = OverviewTarget(path, 0, 0, 4, 4)
    store_block(target, np.ones((2, 2), np.float32))
    shutil.rmtree(path)
    zarr.create_array(path, shape=(6, 6), chunks=(3, 3), dtype="float32", fill_value=0.0)
    store_block(OverviewTarget(path, 0, 0, 6, 6), np.full((3, 3), 2.0, np.float32))
    back = zarr.open_array(path, mode="r")[...]
    assert back.shape == (6, 6) and back[:3, :3].tolist() == [[2.0] * 3] * 3  # the new layout
