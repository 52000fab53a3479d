"""A nightly re-check with the error model on reuses the unchanged tiles' stored samples
(workers/uncertainty/sample_store.py) and fits the model a fresh run fits."""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest
import yaml
from distributed import get_task_stream

from demaudit.service.run.runner import run_job
from demaudit.service.run.tile_tasks import tiles_of_key
from demaudit.workers import spec as job_spec

DEMO = Path(__file__).resolve().parents[2] / "demo_tiles"


def audited(client, root: Path, out: Path, baseline: Path | None = None) -> tuple[dict, list]:
    spec = job_spec.parse_spec(job_spec.load_spec_file(root / "em.yaml"))
    with get_task_stream(client) as stream:
        doc = run_job(job_spec.resolve(spec, base_dir=root), out, client=client, baseline=baseline)
    keys = {str(t["key"]) for t in stream.data if str(t["key"]).startswith("audit-tile-")}
    return doc, sorted({t for k in keys for t in tiles_of_key(k)})


def assert_close(a: object, b: object, path: str = "") -> None:
    """Nested documents equal, floats within 1e-6 relative (sums taken in another tile order)."""
    if isinstance(a, dict) and isinstance(b, dict):
        assert sorted(a) == sorted(b), path
        for k in a:
            assert_close(a[k], b[k], f"{path}.{k}")
    elif isinstance(a, list) and isinstance(b, list):
        assert len(a) == len(b), path
        for i, (x, y) in enumerate(zip(a, b, strict=True)):
            assert_close(x, y, f"{path}[{i}]")
    elif isinstance(a, float) and isinstance(b, float):
        assert a == pytest.approx(b, rel=1e-6, abs=1e-12, nan_ok=True), path
    else:
        assert a == b, path


# 7: the 160 px demo tiles are not a multiple of it, so the overview (and the samples' options)
# decimate by 5; the re-check must still recognise the stored samples
@pytest.mark.parametrize("overview_factor", [8, 7])
def test_a_recheck_carries_samples_and_fits_the_fresh_runs_model(
    dask_client, tmp_path, overview_factor
):
    root = tmp_path / "archive"
    shutil.copytree(DEMO, root)
    raw = yaml.safe_load((root / "demo.yaml").read_text())
    raw.pop("checkpoints", None)
    raw["error_model"] = {"max_distance_m": 3000, "seed": 2, "samples_per_tile": 1000}
    raw.setdefault("options", {})["overview_factor"] = overview_factor
    (root / "em.yaml").write_text(yaml.safe_dump(raw))
    audited(dask_client, root, tmp_path / "base")
    assert (tmp_path / "base" / "results.zarr" / "error_samples").is_dir()
    for update in (root / "release_2026_11_update").glob("*.tif"):
        shutil.copy(update, root / "release_2026_11" / update.name)
    night, recomputed = audited(dask_client, root, tmp_path / "night", tmp_path / "base")
    assert recomputed == sorted(p.stem for p in (root / "release_2026_11_update").glob("*.tif"))
    fresh, _ = audited(dask_client, root, tmp_path / "fresh")
    assert_close(night["error_model"], fresh["error_model"])
    for a, b in zip(night["regions"], fresh["regions"], strict=True):
        assert_close(a["uncertainty"], b["uncertainty"])
    overview = tmp_path / "night" / "results.zarr" / "standardised_dh_overview"
    assert overview.is_dir()
