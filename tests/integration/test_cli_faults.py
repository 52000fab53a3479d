"""Bad input and failed runs through the `demaudit` command (issue 12, items 1, 7, 8, 11): one
clear message naming the file, field or option, the documented exit status, no traceback, and
an output folder that is either the earlier result, untouched, or the complete new one.

The commands run in-process (demaudit.service.cli.main.main) against the session's Dask cluster
(``--scheduler``), so no test starts a cluster of its own.
"""

from __future__ import annotations

import errno
import json
import os
import socket
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pytest
import rasterio
from rasterio.transform import from_origin

from demaudit.service.cli import main as cli
from demaudit.service.run import runner
from demaudit.workers.outputs.figures import background
from demaudit.workers.outputs.folder import write_summary
from demaudit.workers.outputs.layout import SUMMARY_NAME
from tests.conftest import UTM32, write_tif

Run = Callable[..., tuple[int, str, str]]


@pytest.fixture
def demaudit(dask_client, capsys) -> Run:
    """demaudit(*args, cluster=True) -> (exit status, stdout, stderr); run and demo commands get
    the session scheduler and --quiet."""
    address = dask_client.scheduler.address

    def run(*args: str, cluster: bool = True) -> tuple[int, str, str]:
        argv = list(args)
        if cluster and argv[0] in {"run", "demo"}:
            argv += ["--scheduler", address, "--quiet"]
        capsys.readouterr()
        try:
            code = cli.main(argv)
        except SystemExit as exc:  # argparse: usage errors, --help, --version
            code = int(exc.code or 0)
        out, err = capsys.readouterr()
        assert "Traceback" not in out + err
        return code, out, err

    return run


@pytest.fixture
def archive(make_archive) -> Path:
    return make_archive(tiles=2, pixels=40)


def snapshot(folder: Path) -> dict[str, bytes]:
    """Every file under folder (relative path -> content)."""
    return {
        str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()
    }


def leftovers(out: Path) -> list[str]:
    """Staging or set-aside folders a run left beside out."""
    return sorted(p.name for p in out.parent.iterdir() if p.name.startswith(out.name + "."))


def write_spec(archive: Path, name: str, extra: str = "", **replace: str) -> Path:
    text = (archive / "job.yaml").read_text()
    for old, new in replace.items():
        text = text.replace(old, new)
    path = archive / name
    path.write_text(text + extra)
    return path


def checkpoint_csv(path: Path, *, n: int = 12) -> Path:
    """Points inside the test tiles (UTM 32N): heights are not checked here, only the file."""
    rng = np.random.default_rng(3)
    lines = ["# horizontal_crs: EPSG:32632", "id,easting,northing,height"]
    for i in range(n):
        e, north = 480_020 + rng.uniform(0, 360), 6_229_980 - rng.uniform(0, 360)
        lines.append(f"p{i},{e:.2f},{north:.2f},{100 + i * 0.1:.3f}")
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


CHECKPOINTS = "checkpoints: {file: %s, vertical_crs: ellipsoidal}\n"


# --- item 1: a failed run never touches an earlier result -------------------------------------


def test_a_bad_checkpoint_or_region_file_stops_the_run_before_any_tile(archive, demaudit, tmp_path):
    out = tmp_path / "out"
    code, _, _ = demaudit("run", str(archive / "job.yaml"), "--out", str(out))
    assert code == 0
    before = snapshot(out)
    (archive / "points.geojson").write_text('{"type": "FeatureCollection", "features": [')
    spec = write_spec(archive, "cp.yaml", CHECKPOINTS % "points.geojson")
    code, _, err = demaudit("run", str(spec), "--out", str(out))
    assert code == 2
    assert "checkpoints.file" in err and "points.geojson" in err
    assert len(err.strip().splitlines()) == 1
    assert snapshot(out) == before and leftovers(out) == []

    (archive / "bad_regions.geojson").write_text("not json at all")
    spec = write_spec(archive, "rg.yaml", **{"regions.geojson": "bad_regions.geojson"})
    code, _, err = demaudit("run", str(spec), "--out", str(out))
    assert code == 2 and "region.file" in err and "bad_regions.geojson" in err
    assert snapshot(out) == before and leftovers(out) == []


def failing_summary(error: BaseException) -> Callable[..., None]:
    """runner.write_summary that raises error when it writes summary.json (its last write)."""
    real = runner.write_summary

    def write(out_dir, document, **kwargs):
        if kwargs.get("name", SUMMARY_NAME) == SUMMARY_NAME:
            raise error
        return real(out_dir, document, **kwargs)

    return write


def test_a_late_internal_error_leaves_the_earlier_result_whole(
    archive, demaudit, tmp_path, monkeypatch
):
    out = tmp_path / "out"
    assert demaudit("run", str(archive / "job.yaml"), "--out", str(out))[0] == 0
    before = snapshot(out)
    # one tile fewer: the old run would have replaced results.zarr (3 tiles) beside an old
    # 4-tile summary.json before failing
    (archive / "test" / "t_1_1.tif").unlink()

    # the last step: summary.json, with the staged folder full
    monkeypatch.setattr(
        runner, "write_summary", failing_summary(RuntimeError("summary writer exploded"))
    )
    code, _, err = demaudit("run", str(archive / "job.yaml"), "--out", str(out))
    assert code == 3
    assert "internal error" in err and "summary writer exploded" in err
    assert len(err.strip().splitlines()) == 1
    assert snapshot(out) == before and leftovers(out) == []


def test_an_error_while_figures_are_drawn_leaves_no_partial_folder(
    archive, demaudit, tmp_path, monkeypatch
):
    # the first write after the figures start (catalog.json) fails while the background thread
    # still draws into the staged folder: the folder must still go, whole
    out = tmp_path / "out"
    assert demaudit("run", str(archive / "job.yaml"), "--out", str(out))[0] == 0
    before = snapshot(out)

    def broken(out_dir, document, **kwargs):
        raise RuntimeError("writer exploded")

    real_draw = background._draw_early
    folder_there_while_drawing = []

    def slow_draw(ctx):  # still drawing when the job fails
        time.sleep(1.0)
        drawn = real_draw(ctx)
        folder_there_while_drawing.append(ctx.out_dir.is_dir())
        return drawn

    monkeypatch.setattr(runner, "write_summary", broken)
    monkeypatch.setattr(background, "_draw_early", slow_draw)
    code, _, err = demaudit("run", str(archive / "job.yaml"), "--out", str(out))
    assert code == 3 and "writer exploded" in err
    background._THREAD.submit(lambda: None).result()  # whatever the thread still had to do
    # the staged folder went only after the drawing into it ended (else rmtree races the
    # writes), or the drawing was cancelled before it began
    assert folder_there_while_drawing in ([True], [])
    assert snapshot(out) == before and leftovers(out) == []


def test_an_interrupted_run_leaves_the_earlier_result_whole(
    archive, demaudit, tmp_path, monkeypatch
):
    out = tmp_path / "out"
    assert demaudit("run", str(archive / "job.yaml"), "--out", str(out))[0] == 0
    before = snapshot(out)

    monkeypatch.setattr(runner, "write_summary", failing_summary(KeyboardInterrupt()))  # Ctrl-C
    code, _, err = demaudit("run", str(archive / "job.yaml"), "--out", str(out))
    assert code == 130 and "interrupted" in err
    assert snapshot(out) == before and leftovers(out) == []


def test_disk_full_while_writing_is_one_line_and_changes_nothing(
    archive, demaudit, tmp_path, monkeypatch
):
    out = tmp_path / "out"
    assert demaudit("run", str(archive / "job.yaml"), "--out", str(out))[0] == 0
    before = snapshot(out)
    real = write_summary
    calls = []

    def full(folder, document, *, name=SUMMARY_NAME):
        calls.append(name)
        if name == SUMMARY_NAME:  # the last file of a run
            target = Path(folder) / name
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(target))
        return real(folder, document, name=name)

    monkeypatch.setattr("demaudit.service.run.runner.write_summary", full)
    code, _, err = demaudit("run", str(archive / "job.yaml"), "--out", str(out))
    assert calls and code == 2
    assert "No space left on device" in err and "summary.json" in err
    assert len(err.strip().splitlines()) == 1
    assert snapshot(out) == before and leftovers(out) == []


def test_a_run_without_checkpoints_leaves_no_old_residuals(archive, demaudit, tmp_path):
    out = tmp_path / "out"
    checkpoint_csv(archive / "points.csv")
    spec = write_spec(archive, "cp.yaml", CHECKPOINTS % "points.csv")
    assert demaudit("run", str(spec), "--out", str(out))[0] == 0
    assert (out / "checkpoint_residuals.csv").is_file()
    assert demaudit("run", str(archive / "job.yaml"), "--out", str(out))[0] == 0
    assert not (out / "checkpoint_residuals.csv").exists()
    assert "checkpoints" not in json.loads((out / "summary.json").read_text())
    assert leftovers(out) == []


def test_a_recheck_may_write_into_its_own_baseline(archive, demaudit, tmp_path):
    out = tmp_path / "out"
    assert demaudit("run", str(archive / "job.yaml"), "--out", str(out))[0] == 0
    first = json.loads((out / "summary.json").read_text())
    # change one tile: the re-check recomputes it and links the other three from the baseline,
    # which is the folder being replaced
    path = archive / "test" / "t_0_0.tif"
    with rasterio.open(path, "r+") as src:
        src.write(src.read(1) + np.float32(1.0), 1)
    for night in (1, 2):
        code, stdout, _ = demaudit(
            "run", str(archive / "job.yaml"), "--out", str(out), "--baseline", str(out)
        )
        assert code == 0, stdout
        doc = json.loads((out / "summary.json").read_text())
        assert doc["recheck"]["tiles_reused"] == 3 + (night == 2)
        assert leftovers(out) == []
    fresh = tmp_path / "fresh"
    assert demaudit("run", str(archive / "job.yaml"), "--out", str(fresh))[0] == 0
    full = json.loads((fresh / "summary.json").read_text())
    assert doc["overall"]["count"] == full["overall"]["count"] == first["overall"]["count"]
    assert doc["overall"]["mean"] == pytest.approx(full["overall"]["mean"], abs=1e-9)


def test_an_out_path_that_is_a_file_or_a_folder_of_other_files_is_refused(
    archive, demaudit, tmp_path
):
    as_file = tmp_path / "notes.txt"
    as_file.write_text("mine")
    code, _, err = demaudit("run", str(archive / "job.yaml"), "--out", str(as_file))
    assert code == 2 and "--out" in err and "is a file, not a folder" in err
    assert as_file.read_text() == "mine"

    theirs = tmp_path / "documents"
    theirs.mkdir()
    (theirs / "thesis.docx").write_text("years of work")
    code, _, err = demaudit("run", str(archive / "job.yaml"), "--out", str(theirs))
    assert code == 2 and "thesis.docx" in err and "new or empty folder" in err
    assert snapshot(theirs) == {"thesis.docx": b"years of work"} and leftovers(theirs) == []

    under_file = as_file / "out"
    code, _, err = demaudit("run", str(archive / "job.yaml"), "--out", str(under_file))
    assert code == 2 and "notes.txt" in err and "not a folder" in err


@pytest.mark.skipif(os.geteuid() == 0, reason="root writes into read-only folders")
def test_a_read_only_out_is_refused_in_one_line(archive, demaudit, tmp_path):
    parent = tmp_path / "locked"
    parent.mkdir()
    parent.chmod(0o555)
    try:
        code, _, err = demaudit("run", str(archive / "job.yaml"), "--out", str(parent / "out"))
    finally:
        parent.chmod(0o755)
    assert code == 2 and "--out" in err and str(parent) in err
    assert list(parent.iterdir()) == []


def test_a_read_only_file_system_is_refused_in_one_line(archive, demaudit, tmp_path, monkeypatch):
    """As root (CI) permissions do not stop writes: the file system's refusal is simulated."""
    out = tmp_path / "out"
    assert demaudit("run", str(archive / "job.yaml"), "--out", str(out))[0] == 0
    before = snapshot(out)
    real_mkdir = Path.mkdir

    def read_only(self, *args, **kwargs):
        if ".partial-" in self.name:
            raise OSError(errno.EROFS, os.strerror(errno.EROFS), str(self))
        return real_mkdir(self, *args, **kwargs)

    monkeypatch.setattr(Path, "mkdir", read_only)
    code, _, err = demaudit("run", str(archive / "job.yaml"), "--out", str(out))
    monkeypatch.undo()
    assert code == 2 and "Read-only file system" in err and "--out" in err
    assert len(err.strip().splitlines()) == 1
    assert snapshot(out) == before and leftovers(out) == []


# --- item 7: what matters reaches the console and the exit status ----------------------------


def test_void_and_uncovered_tiles_have_a_status_a_caution_and_exit_1(archive, demaudit, tmp_path):
    with rasterio.open(archive / "test" / "t_0_0.tif") as src:
        transform, shape = src.transform, src.shape
    write_tif(
        archive / "test" / "t_0_0.tif",
        np.full(shape, -9999.0),
        crs=UTM32,
        transform=transform,
    )
    far = from_origin(490_000, 6_230_000, 5.0, 5.0)  # 10 km east: no reference there
    write_tif(archive / "test" / "t_far.tif", np.full((40, 40), 90.0), crs=UTM32, transform=far)
    out = tmp_path / "out"
    code, stdout, _ = demaudit("run", str(archive / "job.yaml"), "--out", str(out))
    assert code == 1
    statuses = {
        t["tile"]: t["status"] for t in json.loads((out / "summary.json").read_text())["tiles"]
    }
    assert statuses["t_0_0"] == "no_valid_pixels"
    assert statuses["t_far"] == "no_reference"
    assert sum(s == "ok" for s in statuses.values()) == 3
    assert "1 of 5 test tiles are not in the statistics: no reference tile overlaps them" in stdout
    assert "status no_valid_pixels: t_0_0" in stdout


def test_a_datum_mix_up_caution_is_printed(archive, demaudit, tmp_path):
    # the reference is EGM96 heights; declaring it ellipsoidal leaves the geoid (~40 m) in dh
    spec = write_spec(
        archive, "mixup.yaml", **{"vertical_crs: 'EPSG:5773'": "vertical_crs: ellipsoidal"}
    )
    code, stdout, _ = demaudit("run", str(spec), "--out", str(tmp_path / "out"))
    assert code == 0
    assert "cautions:" in stdout and "check the vertical datum" in stdout


def test_exit_statuses_are_documented_in_help(demaudit):
    code, stdout, _ = demaudit("--help", cluster=False)
    assert code == 0
    documented = ("0  done", "1  done, results written, but", "2  nothing was run", "3  the run")
    for line in documented:
        assert line in stdout


# --- item 8: nonsense options ----------------------------------------------------------------


@pytest.mark.parametrize("value", ["-2", "0", "two"])
def test_workers_must_be_a_positive_number(archive, demaudit, tmp_path, value):
    code, _, err = demaudit(
        "run",
        str(archive / "job.yaml"),
        "--out",
        str(tmp_path / "o"),
        "--workers",
        value,
        cluster=False,
    )
    assert code == 2 and "--workers" in err
    assert not (tmp_path / "o").exists()


def test_workers_with_a_scheduler_is_refused(archive, demaudit, tmp_path, dask_client):
    code, _, err = demaudit(
        "run",
        str(archive / "job.yaml"),
        "--out",
        str(tmp_path / "o"),
        "--workers",
        "3",
        "--scheduler",
        dask_client.scheduler.address,
        cluster=False,
    )
    assert code == 2 and "--workers" in err and "--scheduler" in err
    assert not (tmp_path / "o").exists()


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def test_an_unreachable_scheduler_is_named_at_once(archive, demaudit, tmp_path):
    address = f"tcp://127.0.0.1:{free_port()}"
    code, _, err = demaudit(
        "run",
        str(archive / "job.yaml"),
        "--out",
        str(tmp_path / "o"),
        "--scheduler",
        address,
        cluster=False,
    )
    assert code == 2 and "--scheduler" in err and address in err
    assert not (tmp_path / "o").exists()
    code, _, err = demaudit(
        "run",
        str(archive / "job.yaml"),
        "--out",
        str(tmp_path / "o"),
        "--scheduler",
        "nowhere",
        cluster=False,
    )
    assert code == 2 and "--scheduler" in err

    # a server that accepts connections but never speaks (Dask alone would wait for ever)
    with socket.socket() as silent:
        silent.bind(("127.0.0.1", 0))
        silent.listen(5)
        address = "tcp://{}:{}".format(*silent.getsockname())
        code, _, err = demaudit(
            "run",
            str(archive / "job.yaml"),
            "--out",
            str(tmp_path / "o"),
            "--scheduler",
            address,
            cluster=False,
        )
    assert code == 2 and f"--scheduler: cannot reach a Dask scheduler at {address}" in err
    assert "no answer within" in err
    assert not (tmp_path / "o").exists()


@pytest.mark.parametrize("value", ["-0.1", "0"])
def test_user_thresholds_must_be_positive(archive, demaudit, tmp_path, value):
    spec = write_spec(archive, "user.yaml", f"grading: {{user: {{required_rmse_m: {value}}}}}\n")
    code, _, err = demaudit("run", str(spec), "--out", str(tmp_path / "o"))
    assert code == 2 and "grading.user.required_rmse_m" in err and "greater than 0" in err
    assert not (tmp_path / "o").exists()


# --- item 11: validate and --version ---------------------------------------------------------


def test_validate_checks_files_and_tiles_without_running(archive, demaudit, tmp_path):
    checkpoint_csv(archive / "points.csv")
    spec = write_spec(archive, "cp.yaml", CHECKPOINTS % "points.csv")
    code, stdout, _ = demaudit("validate", str(spec), "--out", str(tmp_path / "o"))
    assert code == 0 and "valid; nothing was run" in stdout
    assert "4 test, 9 reference" in stdout and "12 points" in stdout
    assert not (tmp_path / "o").exists()

    (archive / "test" / "t_1_0.tif").write_bytes(b"not a tiff")
    code, stdout, _ = demaudit("validate", str(spec))
    assert code == 1 and "t_1_0" in stdout

    (archive / "points.csv").unlink()
    (archive / "points.csv").mkdir()
    code, _, err = demaudit("validate", str(spec))
    assert code == 2 and "checkpoints.file" in err


def test_validate_with_pixels_finds_void_codes_without_a_nodata_tag(archive, demaudit):
    with rasterio.open(archive / "test" / "t_0_1.tif") as src:
        heights, transform = src.read(1), src.transform
    heights[:10, :] = -9999.0  # a quarter of the tile: voids coded, but not tagged
    write_tif(archive / "test" / "t_0_1.tif", heights, crs=UTM32, transform=transform, nodata=None)
    code, stdout, _ = demaudit("validate", str(archive / "job.yaml"))
    assert code == 0  # headers alone cannot tell
    code, stdout, _ = demaudit("validate", str(archive / "job.yaml"), "--pixels")
    assert code == 1 and "t_0_1" in stdout and "-9999" in stdout and "nodata" in stdout


def test_validate_refuses_a_bad_region_file(archive, demaudit):
    (archive / "regions.geojson").write_text('{"type": "Feature"}')
    code, _, err = demaudit("validate", str(archive / "job.yaml"))
    assert code == 2 and "region.file" in err and "regions.geojson" in err


def test_version(demaudit):
    code, stdout, _ = demaudit("--version", cluster=False)
    assert code == 0 and stdout.startswith("demaudit ") and stdout.split()[1][0].isdigit()
