"""The output folder appears complete or not at all
(demaudit.workers.outputs.folder.staged_folder)."""

from __future__ import annotations

import errno
import os
from pathlib import Path

import pytest

from demaudit.workers.errors import AuditError, OutputError, SpecError
from demaudit.workers.outputs.folder import staged_folder, write_by_rename
from demaudit.workers.outputs.layout import SUMMARY_NAME


def files(folder: Path) -> dict[str, str]:
    return {str(p.relative_to(folder)): p.read_text() for p in folder.rglob("*") if p.is_file()}


def earlier_result(folder: Path) -> Path:
    (folder / "results.zarr").mkdir(parents=True)
    (folder / "results.zarr" / "zarr.json").write_text("old")
    (folder / "summary.json").write_text("old summary")
    (folder / "checkpoint_residuals.csv").write_text("old residuals")
    return folder


def test_a_complete_build_replaces_the_earlier_result_as_a_whole(tmp_path):
    out = earlier_result(tmp_path / "out")
    with staged_folder(out, "r1") as stage:
        assert stage.parent == out.parent and stage != out
        assert files(out)["summary.json"] == "old summary"  # untouched while building
        (stage / "summary.json").write_text("new summary")
    assert files(out) == {"summary.json": "new summary"}  # no stale residuals
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]


@pytest.mark.parametrize("code", [errno.ENOSPC, errno.EROFS, errno.EDQUOT])
def test_a_file_system_error_leaves_the_earlier_result(tmp_path, code):
    out = earlier_result(tmp_path / "out")
    before = files(out)
    with pytest.raises(OutputError) as caught, staged_folder(out, "r2") as stage:
        (stage / "summary.json").write_text("half")
        raise OSError(code, os.strerror(code), str(stage / "results.zarr" / "c" / "0"))
    message = str(caught.value)
    assert os.strerror(code) in message and "results.zarr" in message and "\n" not in message
    assert isinstance(caught.value, AuditError)
    assert files(out) == before and sorted(p.name for p in tmp_path.iterdir()) == ["out"]


def test_an_audit_error_passes_unchanged_and_the_stage_goes(tmp_path):
    out = tmp_path / "new"
    with pytest.raises(SpecError, match="checkpoints.file"), staged_folder(out, "r3") as stage:
        (stage / "x").write_text("x")
        raise SpecError("checkpoints.file: bad")
    assert list(tmp_path.iterdir()) == []


def test_a_failed_swap_puts_the_earlier_result_back(tmp_path, monkeypatch):
    out = earlier_result(tmp_path / "out")
    before = files(out)
    real = Path.rename

    def refuse_stage(self, target):
        if ".partial-" in self.name:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(self))
        return real(self, target)

    monkeypatch.setattr(Path, "rename", refuse_stage)
    with pytest.raises(OutputError), staged_folder(out, "r4") as stage:
        (stage / "summary.json").write_text("new")
    monkeypatch.undo()
    assert files(out) == before and sorted(p.name for p in tmp_path.iterdir()) == ["out"]


def test_a_file_or_a_folder_of_other_files_is_refused_before_anything(tmp_path):
    (tmp_path / "f").write_text("mine")
    with (
        pytest.raises(OutputError, match="is a file, not a folder"),
        staged_folder(tmp_path / "f", "r5"),
    ):
        pass
    (tmp_path / "docs").mkdir()
    (tmp_path / "docs" / "a.txt").write_text("a")
    with pytest.raises(OutputError, match="a.txt"), staged_folder(tmp_path / "docs", "r6"):
        pass
    assert sorted(p.name for p in tmp_path.iterdir()) == ["docs", "f"]


def test_an_empty_folder_is_used(tmp_path):
    (tmp_path / "out").mkdir()
    with staged_folder(tmp_path / "out", "r7") as stage:
        (stage / SUMMARY_NAME).write_text("{}")
    assert files(tmp_path / "out") == {"summary.json": "{}"}


def test_write_by_rename_never_writes_through_a_link(tmp_path):
    # a re-check's store hard-links its baseline's files: replacing one must leave the
    # baseline's as it was, and so must a leftover temporary file that shares a link with it
    target = tmp_path / "new" / "c.0.0"
    target.parent.mkdir()
    baseline = tmp_path / "baseline_chunk"
    baseline.write_bytes(b"baseline")
    os.link(baseline, target)
    stray = target.with_name(f".{target.name}.{os.getpid()}.partial")
    os.link(baseline, stray)
    write_by_rename(target, b"new")
    assert target.read_bytes() == b"new" and baseline.read_bytes() == b"baseline"
    assert stray.read_bytes() == b"baseline"


def test_write_by_rename_leaves_no_temporary_file_when_it_fails(tmp_path, monkeypatch):
    target = tmp_path / "c.0.0"
    target.write_bytes(b"old")

    def refuse(*args):
        raise OSError(errno.ENOSPC, "no space left")

    monkeypatch.setattr(os, "replace", refuse)
    with pytest.raises(OSError):
        write_by_rename(target, b"new")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["c.0.0"]
    assert target.read_bytes() == b"old"
