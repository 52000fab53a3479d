"""`demaudit make-demo-archive` through the CLI entry point: refusals and the progress bar."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from demaudit.service.cli.main import main
from demaudit.workers.demo import archive as demo_archive

SMALL = ["--tiles", "2x2", "--pixels", "24"]


def _run(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, str, str]:
    status = main(["make-demo-archive", *argv])
    captured = capsys.readouterr()
    return status, captured.out, captured.err


def test_writes_an_archive_with_a_progress_bar(tmp_path: Path, capsys) -> None:
    status, out, err = _run(capsys, "--out", str(tmp_path / "new"), *SMALL)
    assert status == 0
    assert "job spec" in out and (tmp_path / "new" / "demo.yaml").is_file()
    assert "demo archive" in err and "tile" in err  # the bar is on stderr
    truth = json.loads((tmp_path / "new" / "truth.json").read_text())
    assert truth["tiles"] == {"x": 2, "y": 2} and truth["pixels"] == 24


def test_refuses_a_folder_that_is_not_empty(tmp_path: Path, capsys) -> None:
    folder = tmp_path / "mine"
    folder.mkdir()
    (folder / "thesis.tif").write_text("the user's own file")
    status, _, err = _run(capsys, "--out", str(folder), *SMALL)
    assert status == 2
    assert str(folder) in err and "--force" in err and "Traceback" not in err
    assert [p.name for p in folder.iterdir()] == ["thesis.tif"]
    assert (folder / "thesis.tif").read_text() == "the user's own file"


def test_force_writes_into_a_folder_that_is_not_empty(tmp_path: Path, capsys) -> None:
    folder = tmp_path / "again"
    assert _run(capsys, "--out", str(folder), *SMALL, "--quiet")[0] == 0
    status, _, err = _run(capsys, "--out", str(folder), *SMALL, "--force", "--quiet")
    assert status == 0 and err == ""
    assert len(list((folder / "release_2026_11").glob("*.tif"))) == 4


def test_refuses_an_out_that_is_a_file(tmp_path: Path, capsys) -> None:
    target = tmp_path / "file.txt"
    target.write_text("x")
    status, _, err = _run(capsys, "--out", str(target), *SMALL)
    assert status == 2 and str(target) in err and "not a folder" in err


def test_refuses_an_archive_bigger_than_the_disk_before_writing(tmp_path: Path, capsys) -> None:
    folder = tmp_path / "huge"
    status, _, err = _run(capsys, "--out", str(folder), "--tiles", "1000x1000", "--pixels", "1000")
    assert status == 2 and "Traceback" not in err
    assert "--tiles 1000x1000 --pixels 1000" in err and "GiB" in err and "disk" in err
    assert not folder.exists()


def test_refuses_a_tile_bigger_than_the_memory(tmp_path: Path, capsys, monkeypatch) -> None:
    monkeypatch.setattr(demo_archive, "_available_memory", lambda: 2**30)
    # 4000 x 4000 pixels x TASK_BYTES_PER_PIXEL = 3.2 GB for one tile task
    status, _, err = _run(
        capsys, "--out", str(tmp_path / "big"), "--tiles", "1x1", "--pixels", "4000"
    )
    assert status == 2 and "memory" in err and "--pixels 4000" in err
    assert not (tmp_path / "big").exists()


@pytest.mark.parametrize(
    ("argv", "words"),
    [
        (["--tiles", "8by8"], "--tiles must look like 8x8"),
        (["--tiles", "0x3"], "at least one tile"),
        (["--tiles", "2x2", "--pixels", "4"], "at least 8 pixels"),
        (["--tiles", "2x2", "--seed", "-1"], "seed"),
    ],
)
def test_refuses_bad_options(tmp_path: Path, capsys, argv: list[str], words: str) -> None:
    status, _, err = _run(capsys, "--out", str(tmp_path / "x"), *argv)
    assert status == 2 and words in err and "Traceback" not in err
    assert not (tmp_path / "x").exists()
