"""Installed from a wheel, the code is one package, demaudit: no top-level service or workers."""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]


def build_wheel(tmp_path: Path) -> Path:
    source = tmp_path / "source"
    source.mkdir()
    for name in ("pyproject.toml", "README.md"):
        shutil.copy(ROOT / name, source / name)
    for folder in ("service", "workers"):
        shutil.copytree(
            ROOT / folder, source / folder, ignore=shutil.ignore_patterns("__pycache__")
        )
    wheels = tmp_path / "wheels"
    subprocess.run(
        [
            sys.executable,
            "-m",
            "pip",
            "wheel",
            "--no-deps",
            "--no-build-isolation",
            "--no-index",
            "-q",
            "-w",
            str(wheels),
            str(source),
        ],
        check=True,
        capture_output=True,
    )
    (wheel,) = wheels.glob("demaudit-*.whl")
    return wheel


def test_the_installed_package_has_one_import_name(tmp_path: Path) -> None:
    site = tmp_path / "site"
    wheel = build_wheel(tmp_path)
    subprocess.run(
        [
            sys.executable,
            "-m",
            "pip",
            "install",
            "--no-deps",
            "--no-index",
            "-q",
            "--target",
            str(site),
            str(wheel),
        ],
        check=True,
        capture_output=True,
    )
    top_level = {p.name for p in site.iterdir() if not p.name.endswith((".dist-info", ".data"))}
    assert "demaudit" in top_level
    assert not top_level & {"service", "workers"}
    probe = (
        "import importlib.util as u, sys; sys.path[:0] = [sys.argv[1]];"
        "print(u.find_spec('service'), u.find_spec('workers'),"
        " u.find_spec('demaudit.workers') is not None,"
        " u.find_spec('demaudit.service.api') is not None)"
    )
    # -I -S: no current folder, no PYTHON* variables, no site-packages (so not the venv's editable
    # install either): the probe sees the wheel's files only.
    out = subprocess.run(
        [sys.executable, "-I", "-S", "-c", probe, str(site)],
        cwd=tmp_path,
        check=True,
        capture_output=True,
        text=True,
    ).stdout.split()
    assert out == ["None", "None", "True", "True"]
    templates = site / "demaudit" / "service" / "api" / "templates"
    assert sorted(p.name for p in templates.glob("*.html")) != []
