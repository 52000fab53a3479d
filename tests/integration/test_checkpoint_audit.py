"""Checkpoint audits end to end: the grade the injected errors imply, and bad points."""

from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np
import pytest

from demaudit.service.run.runner import run_job
from demaudit.workers import spec as job_spec
from demaudit.workers.checkpoints.grading import ASPRS_CLASSES_CM
from demaudit.workers.demo.archive import make_demo_archive
from demaudit.workers.demo.options import DemoArchiveOptions
from demaudit.workers.demo.surface import terrain_slope
from demaudit.workers.demo.world import build_world
from demaudit.workers.errors import SpecError


def run(spec_path: Path, out: Path, client, **changes) -> dict:
    data = job_spec.load_spec_file(spec_path)
    data.update(changes)
    spec = job_spec.parse_spec(data)
    return run_job(job_spec.resolve(spec, base_dir=spec_path.parent), out, client=client)


@pytest.fixture(scope="module")
def noisy_archive(tmp_path_factory) -> tuple[Path, DemoArchiveOptions]:
    # bias and slope-dependent noise only: no shift, canopy, blunders, voids or tilt
    options = DemoArchiveOptions(
        tiles_x=5,
        tiles_y=5,
        pixels=160,
        seed=4,
        shift_east_m=0.0,
        shift_north_m=0.0,
        vertical_bias_m=0.10,
        canopy=False,
        blunder_fraction=0.0,
        void_patches=0,
        tilt_m_per_km=0.0,
        write_update=False,
    )
    root = tmp_path_factory.mktemp("noisy")
    return make_demo_archive(root, options), options


def expected_rmse(root: Path, options: DemoArchiveOptions) -> float:
    """RMSE_z of the non-vegetated checkpoints implied by truth.json: the bias, the pixel noise
    sigma + k tan(slope) as bilinear sampling passes it on (independent pixel errors with weights
    w_i give variance sigma^2 sum(w_i^2)), and the survey error."""
    truth = json.loads((root / "truth.json").read_text())
    rows = [
        r
        for r in csv.DictReader(
            line for line in (root / "checkpoints.csv").open() if not line.startswith("#")
        )
        if r["landcover"] in {"1", "3"}
    ]
    e = np.array([float(r["easting"]) for r in rows])
    n = np.array([float(r["northing"]) for r in rows])
    tan_slope = terrain_slope(build_world(options), e, n)
    sigma = truth["noise"]["sigma_m"] + truth["noise"]["slope_factor"] * tan_slope
    pixel = truth["test"]["pixel_size_m"]
    dk = ((e - truth["test"]["domain_west_m"]) / pixel - 0.5) % 1.0
    dr = ((truth["test"]["domain_north_m"] - n) / pixel - 0.5) % 1.0
    weight_sq = ((1 - dr) ** 2 + dr**2) * ((1 - dk) ** 2 + dk**2)
    survey = truth["checkpoints"]["survey_rmse_m"]
    variance = truth["vertical_bias_m"] ** 2 + np.mean(weight_sq * sigma**2) + survey**2
    return float(np.sqrt(variance))


def test_grade_matches_the_injected_errors(noisy_archive, dask_client, tmp_path):
    spec_path, options = noisy_archive
    root = spec_path.parent
    implied = expected_rmse(root, options)
    # the class the truth implies: the strictest standard class at least as large
    implied_class = next(c for c in ASPRS_CLASSES_CM if c / 100 >= implied)
    doc = run(
        spec_path,
        tmp_path / "out",
        dask_client,
        grading={
            "standards": ["nssda", "asprs2023", "user"],
            "asprs_class_cm": 5.0,
            "user": {"required_rmse_m": implied * 1.5},
        },
    )
    cp = doc["checkpoints"]
    measured = cp["vertical_accuracy"]["rmse_z_non_vegetated"]
    # about 100 points: the realised RMSE is within ~15 % of the implied one
    assert measured == pytest.approx(implied, rel=0.15)
    by_standard = {g["standard"].split(" (")[0].split(",")[0]: g for g in cp["grading"]}
    asprs = by_standard["ASPRS Positional Accuracy Standards"]
    assert asprs["best_class_met"] == f"{implied_class:g}-cm"
    assert asprs["met"] is False  # the 5-cm class is stricter than the release
    assert by_standard["user-defined class"]["met"] is True
    nssda = by_standard["NSSDA"]
    assert nssda["accuracy_z_95_m"] == pytest.approx(1.96 * measured)
    # no voids here: only points within half a pixel of the domain's outer edge may be left out
    assert all("edge" in r["reason"] for r in cp["rejected"])
    assert cp["counts"]["used"] > 0.95 * cp["counts"]["read"]


def test_bad_checkpoints_are_reported_per_point(make_archive, dask_client, tmp_path, tif_writer):
    import rasterio

    root = make_archive(tiles=2, pixels=40)
    # a void in tile t_0_0 around pixel (10, 10)
    with rasterio.open(root / "test" / "t_0_0.tif", "r+") as dst:
        data = dst.read(1)
        data[8:13, 8:13] = -9999.0
        dst.write(data, 1)
    rows = [
        "id,easting,northing,height,landcover",
        "ok1,480101.0,6229901.0,50.0,1",
        "nohgt,480101.0,6229899.0,,1",
        "void,480052.5,6229947.5,50.0,1",
        "far,600000.0,6000000.0,50.0,1",
        "ok1,480103.0,6229903.0,50.0,1",
    ]
    (root / "cp.csv").write_text("# survey_rmse_m: 0.01\n" + "\n".join(rows) + "\n")
    checkpoints = {"file": "cp.csv", "crs": "EPSG:32632", "vertical_crs": "EPSG:5773"}
    doc = run(root / "job.yaml", tmp_path / "out", dask_client, checkpoints=checkpoints)
    reasons = {r["id"]: r["reason"] for r in doc["checkpoints"]["rejected"]}
    assert "no height" in reasons["nohgt"]
    assert "void" in reasons["void"]
    assert "outside every test tile" in reasons["far"]
    assert "duplicated id" in reasons["ok1"]
    assert doc["checkpoints"]["counts"] == {"read": 5, "used": 1, "rejected": 4}
    used = doc["checkpoints"]["stats"]
    assert used["count"] == 1
    residuals = list(csv.DictReader((tmp_path / "out" / "checkpoint_residuals.csv").open()))
    assert {r["id"] for r in residuals} == {"ok1", "nohgt", "void", "far"}

    unknown = checkpoints | {"crs": "EPSG:99999"}
    spec = job_spec.load_spec_file(root / "job.yaml") | {"checkpoints": unknown}
    job = job_spec.resolve(job_spec.parse_spec(spec), base_dir=root)
    # a CRS that cannot be read is bad input, refused before any tile runs
    with pytest.raises(SpecError, match="checkpoints.crs: the CRS 'EPSG:99999', which cannot"):
        run_job(job, tmp_path / "out2", client=dask_client)


def test_checkpoints_without_reference_tiles(make_archive, dask_client, tmp_path):
    root = make_archive(tiles=2, pixels=40, bias=0.25)
    (root / "cp.csv").write_text("id,easting,northing,height\np,480101.0,6229901.0,0\n")
    data = job_spec.load_spec_file(root / "job.yaml")
    del data["reference"]
    data["checkpoints"] = {
        "file": "cp.csv",
        "crs": "EPSG:32632",
        "vertical_crs": "EPSG:5773",
        "landcover_column": None,
    }
    spec = job_spec.parse_spec(data)
    doc = run_job(job_spec.resolve(spec, base_dir=root), tmp_path / "out", client=dask_client)
    assert {t["status"] for t in doc["tiles"]} == {"not_audited"}
    assert doc["checkpoints"]["counts"]["used"] == 1


def test_plain_id_x_y_height_checkpoints_are_graded_as_non_vegetated(
    make_archive, dask_client, tmp_path
):
    # a checkpoint file with no class column and no land-cover raster: the points are graded as
    # non-vegetated (as unclassified pixels are), and the document says so
    from tests.conftest import terrain

    root = make_archive(tiles=2, pixels=40, bias=0.25)
    rng = np.random.default_rng(8)
    e = rng.uniform(480_020, 480_380, 30)
    n = rng.uniform(6_229_620, 6_229_980, 30)
    heights = terrain(e, n)
    rows = [f"p{i},{e[i]:.3f},{n[i]:.3f},{heights[i]:.4f}" for i in range(e.size)]
    (root / "cp.csv").write_text("id,easting,northing,height\n" + "\n".join(rows) + "\n")
    checkpoints = {"file": "cp.csv", "crs": "EPSG:32632", "vertical_crs": "EPSG:5773"}
    grading = {"standards": ["nssda", "asprs2014", "asprs2023", "user"]}
    grading |= {"asprs_class_cm": 10.0, "user": {"required_rmse_m": 0.30}}
    doc = run(
        root / "job.yaml", tmp_path / "out", dask_client, checkpoints=checkpoints, grading=grading
    )
    cp = doc["checkpoints"]
    assert cp["counts"]["used"] == 30
    # dh is the archive's 0.25 m bias (bilinear sampling of smooth terrain adds millimetres)
    rmse = cp["vertical_accuracy"]["rmse_z_non_vegetated"]
    assert cp["vertical_accuracy"]["count_non_vegetated"] == 30
    assert rmse == pytest.approx(0.25, abs=0.01)
    assumption = next(c for c in doc["cautions"] if "no land-cover class" in c)
    assert "30 of 30" in assumption and "graded as non-vegetated" in assumption
    by_standard = {g["standard"]: g for g in cp["grading"]}
    nssda = by_standard["NSSDA (FGDC-STD-007.3-1998)"]
    # NSSDA (FGDC-STD-007.3-1998, published): Accuracy_z = 1.9600 RMSE_z
    assert nssda["accuracy_z_95_m"] == pytest.approx(1.96 * rmse)
    assert nssda["statement"].startswith("Tested 0.4")
    # ASPRS 2014 Table 7.5 (from memory): 10-cm class fails at RMSE 0.25 m; the 33.3-cm class
    # (RMSE <= 0.333, NVA <= 0.653) is the best met; decided without a VVA (none vegetated)
    e1 = by_standard["ASPRS Positional Accuracy Standards, Edition 1 (2014)"]
    assert e1["met"] is False and e1["best_class_met"] == "33.3-cm"
    assert "no vegetated checkpoints" in e1["scope"]
    e2 = by_standard["ASPRS Positional Accuracy Standards, Edition 2 (2023)"]
    assert e2["met"] is False and e2["best_class_met"] == "33.3-cm"
    user = by_standard["user-defined class"]
    assert user["met"] is True
    for grade in cp["grading"]:
        assert any("graded as non-vegetated" in a for a in grade["assumptions"])
    residuals = list(csv.DictReader((tmp_path / "out" / "checkpoint_residuals.csv").open()))
    assert {r["cover_group"] for r in residuals} == {"non_vegetated"}
    report = (tmp_path / "out" / "report.html").read_text()
    assert nssda["statement"] in report
