"""The result folder's names (demaudit.workers.outputs.layout)."""

from __future__ import annotations

import fnmatch
from pathlib import Path

from demaudit.workers.outputs import layout


def test_what_a_run_leaves_beside_a_folder_matches_the_leftover_patterns(tmp_path: Path):
    target = tmp_path / "job-1"
    beside = [layout.partial_folder(target, "r1"), layout.replaced_folder(target, "r1")]
    patterns = layout.leftover_patterns(target.name)
    for folder in beside:
        assert folder.parent == tmp_path
        assert any(fnmatch.fnmatch(folder.name, p) for p in patterns)
    # a neighbour whose name starts the same is no leftover of this job
    assert not any(fnmatch.fnmatch("job-10", p) for p in patterns)
    assert not any(
        fnmatch.fnmatch(layout.partial_folder(tmp_path / "job-10", "r1").name, p) for p in patterns
    )


def test_a_result_needs_both_its_summary_and_its_store(tmp_path: Path):
    assert not layout.is_result(tmp_path)
    (tmp_path / layout.SUMMARY_NAME).write_text("{}")
    assert not layout.is_result(tmp_path)
    (tmp_path / layout.ZARR_NAME).mkdir()
    assert layout.is_result(tmp_path)


def test_the_store_is_built_beside_itself_and_the_execution_record_under_the_results(
    tmp_path: Path,
):
    store = tmp_path / "out" / layout.ZARR_NAME
    assert layout.partial_store(store) == tmp_path / "out" / "results.zarr.partial"
    assert layout.execution_record(tmp_path, "j") == tmp_path / ".execution" / "j.json"
