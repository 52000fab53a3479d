"""report.html in a real browser (Debian's chromium, headless)."""

from __future__ import annotations

import html
import json
import os
import re
import shutil
import subprocess
import tempfile

import numpy as np
import pytest
import rasterio
from PIL import Image

from demaudit.service.run.runner import run_job
from demaudit.workers import spec as job_spec

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


PROBE = """<script>
window.addEventListener("load", () => {
  const out = document.createElement("pre");
  out.id = "probe";
  out.textContent = JSON.stringify(
    Array.from(document.images, (i) => [i.dataset.name, i.naturalWidth, i.src.slice(0, 22)]));
  document.body.appendChild(out);
});
</script>"""


def _decoded_images(*, page_file, tmp_path) -> dict[str, int]:
    """naturalWidth of each image of the page, read by a probe script added to a copy of it in
    a folder of its own (so a figure linked instead of embedded would not load)."""
    folder = tmp_path / "probe"
    folder.mkdir()
    probe = folder / "report.html"
    probe.write_text(page_file.read_text(encoding="utf-8").replace("</body>", PROBE + "</body>"))
    dom = chromium("--virtual-time-budget=10000", "--dump-dom", probe.as_uri()).stdout
    found = re.search(r'<pre id="probe">(.*?)</pre>', dom, re.S)
    assert found, "the probe script did not run"
    rows = json.loads(html.unescape(found.group(1)))
    assert all(src == "data:image/png;base64," for _, _, src in rows), rows
    return {name: width for name, width, _ in rows}


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
    for anchor in ("overall", "regions", "tiles", "strata", "sources"):
        assert f'<section id="{anchor}">' in dom
    assert {"dh_map.png", "dh_histogram.png", "tile_grade.png"} <= set(doc["figures"])
    decoded = _decoded_images(page_file=out / "report.html", tmp_path=tmp_path)
    # every figure is embedded (no file next to the page is fetched) and the browser decodes it
    assert set(decoded) == set(doc["figures"])
    assert all(width > 100 for width in decoded.values()), decoded
    shot = tmp_path / "page.png"
    chromium("--window-size=1100,1400", f"--screenshot={shot}", page)
    pixels = np.asarray(Image.open(shot).convert("L"), dtype=float)
    assert pixels.std() > 10  # text, tables and the map, not a blank page


def test_recheck_report_shows_the_changes_and_their_figures(make_archive, dask_client, tmp_path):
    root = make_archive(tiles=2, pixels=40, noise=0.3)
    spec = job_spec.parse_spec(job_spec.load_spec_file(root / "job.yaml"))
    job = job_spec.resolve(spec, base_dir=root)
    run_job(job, tmp_path / "night1", client=dask_client)
    with rasterio.open(root / "test" / "t_0_0.tif", "r+") as dst:  # one tile 2 m higher
        data = dst.read(1)
        dst.write(np.where(np.isfinite(data), data + 2.0, data).astype(data.dtype), 1)
    out = tmp_path / "night2"
    doc = run_job(job, out, client=dask_client, baseline=tmp_path / "night1")
    assert doc["recheck"]["tiles_recomputed"] == ["t_0_0"]
    assert {"recheck_tiles.png", "recheck_regions.png"} <= set(doc["figures"])
    verdicts = doc["figures"]["recheck_tiles.png"]["verdicts"]
    assert verdicts["regressed"] == 1 and verdicts["reused"] == 3
    dom = chromium("--dump-dom", (out / "report.html").as_uri()).stdout
    assert '<section id="recheck">' in dom and "regressed" in dom and "t_0_0" in dom
    decoded = _decoded_images(page_file=out / "report.html", tmp_path=tmp_path)
    assert set(decoded) == set(doc["figures"]) and min(decoded.values()) > 100
