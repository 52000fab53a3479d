"""report.html in a real browser (Debian's chromium, headless)."""

from __future__ import annotations

import os
import shutil
import subprocess
import tempfile

import numpy as np
import pytest
from PIL import Image

from service.runner import run_job
from workers import spec as job_spec

CHROMIUM = shutil.which("chromium")
FLAGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
]


def chromium(*args: str) -> subprocess.CompletedProcess[str]:
    if CHROMIUM is None:
        if os.environ.get("CI"):
            pytest.fail(
                "chromium is missing in CI: deploy/setup.sh installs it with "
                "DEMAUDIT_WITH_BROWSER=1"
            )
        pytest.skip("chromium is not installed (bash deploy/setup.sh --tests)")
    with tempfile.TemporaryDirectory() as profile:
        return subprocess.run(
            [CHROMIUM, *FLAGS, f"--user-data-dir={profile}", *args],
            capture_output=True,
            text=True,
            timeout=120,
            check=True,
        )


def test_report_page_renders_in_chromium(make_archive, dask_client, tmp_path):
    root = make_archive(tiles=2, pixels=40, noise=0.3)
    spec = job_spec.parse_spec(job_spec.load_spec_file(root / "job.yaml"))
    out = tmp_path / "out"
    doc = run_job(job_spec.resolve(spec, base_dir=root), out, client=dask_client)
    page = (out / "report.html").as_uri()
    dom = chromium("--dump-dom", page).stdout
    assert "DEM audit: tiny" in dom
    assert "Cautions" in dom and "do not replace" in dom
    assert "WEST" in dom and "EAST" in dom
    assert f"{doc['overall']['count']:,}" in dom
    for name in doc["figures"]:
        assert f'src="{name}"' in dom
    shot = tmp_path / "page.png"
    chromium("--window-size=1100,1400", f"--screenshot={shot}", page)
    pixels = np.asarray(Image.open(shot).convert("L"), dtype=float)
    assert pixels.std() > 10  # text, tables and the map, not a blank page
