"""The full chain on the demo archive finds what the generator injected (truth.json)."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from demaudit.service.run.runner import run_job
from demaudit.workers import spec as job_spec
from demaudit.workers.demo.archive import clean_options, make_demo_archive

DEMO = Path(__file__).resolve().parents[2] / "demo_tiles"


def run(spec_path: Path, out: Path, client) -> dict:
    spec = job_spec.parse_spec(job_spec.load_spec_file(spec_path))
    return run_job(job_spec.resolve(spec, base_dir=spec_path.parent), out, client=client)


def strata(area: dict) -> dict[str, dict]:
    return {s["stratum"]: s["stats"] for s in area["strata"]}


@pytest.fixture(scope="module")
def demo_doc(dask_client, tmp_path_factory) -> dict:
    return run(DEMO / "demo.yaml", tmp_path_factory.mktemp("demo") / "out", dask_client)


@pytest.fixture(scope="module")
def truth() -> dict:
    return json.loads((DEMO / "truth.json").read_text())


def test_clean_archive_gives_the_bias_through_the_full_chain(dask_client, tmp_path):
    # no shift, noise, canopy or blunders: other CRS, other tiling and the geoid remain.
    spec = make_demo_archive(tmp_path / "clean", clean_options(tiles_x=3, tiles_y=3, pixels=80))
    doc = run(spec, tmp_path / "out", dask_client)
    bias = json.loads((tmp_path / "clean" / "truth.json").read_text())["vertical_bias_m"]
    open_ground = strata(doc["overall_detail"])["landcover:open ground"]
    assert open_ground["count"] > 10_000
    assert abs(open_ground["median"] - bias) < 0.01
    assert open_ground["nmad"] < 0.01


def test_every_tile_and_province_is_reported(demo_doc, truth):
    assert len(demo_doc["tiles"]) == truth["tiles"]["x"] * truth["tiles"]["y"]
    assert {t["status"] for t in demo_doc["tiles"]} == {"ok"}
    assert [r["region"] for r in demo_doc["regions"]] == ["SU", "EW", "HF", "TC"]
    assert all(r["stats"]["count"] > 0 for r in demo_doc["regions"])


def test_nmad_rises_with_slope_on_non_vegetated_ground(demo_doc):
    # the generator's noise grows with tan(slope), and the uncorrected shift adds slope-dependent
    # error too: the spread must rise band by band.
    by_stratum = strata(demo_doc["overall_detail"])
    bands = ["0-5", "5-15", "15-30"]
    nmads = [by_stratum[f"cover_group:non_vegetated/slope_deg:{b}"]["nmad"] for b in bands]
    counts = [by_stratum[f"cover_group:non_vegetated/slope_deg:{b}"]["count"] for b in bands]
    assert min(counts) > 1000
    assert nmads == sorted(nmads) and nmads[-1] > 1.5 * nmads[0]


def test_canopy_offset_shows_in_the_forest_class(demo_doc, truth):
    by_stratum = strata(demo_doc["overall_detail"])
    low, high = truth["canopy"]["forest_m"]
    offset = (
        by_stratum["landcover:forest"]["median"] - by_stratum["landcover:open ground"]["median"]
    )
    assert low < offset < high
    assert by_stratum["cover_group:vegetated"]["median"] > 5.0


def test_water_is_excluded(demo_doc):
    by_stratum = strata(demo_doc["overall_detail"])
    assert not any("water" in key for key in by_stratum)
    assert demo_doc["overall_detail"]["excluded_pixels"] > 0
    # the strata of the non-excluded classes add up to every counted pixel
    classes = ["landcover:open ground", "landcover:forest", "landcover:built-up"]
    assert sum(by_stratum[c]["count"] for c in classes) == demo_doc["overall"]["count"]


def test_open_ground_median_near_the_bias(demo_doc, truth):
    # The shift is not removed here (co-registration is a separate step), so allow 5 cm.
    open_ground = strata(demo_doc["overall_detail"])["landcover:open ground"]
    assert abs(open_ground["median"] - truth["vertical_bias_m"]) < 0.05


def test_outlier_rule_and_intervals_are_reported(demo_doc):
    detail = demo_doc["overall_detail"]
    assert detail["without_outliers"]["rule"] == "|dh - median| > 5 x NMAD"
    assert detail["without_outliers"]["removed"] > 0
    lo, hi = detail["confidence_95"]["median"]
    assert lo <= demo_doc["overall"]["median"] <= hi


@pytest.fixture(scope="module")
def coregistered_out(tmp_path_factory) -> Path:
    return tmp_path_factory.mktemp("coreg") / "out"


@pytest.fixture(scope="module")
def coregistered_doc(dask_client, coregistered_out) -> dict:
    return run(DEMO / "demo_coregistered.yaml", coregistered_out, dask_client)


def test_injected_shift_and_bias_are_recovered(coregistered_doc, truth):
    job = coregistered_doc["coregistration"]
    pixel = truth["test"]["pixel_size_m"]
    assert job["status"] == "ok"
    assert abs(job["east_m"] - truth["shift"]["east_m"]) < 0.1 * pixel
    assert abs(job["north_m"] - truth["shift"]["north_m"]) < 0.1 * pixel
    assert abs(job["vertical_m"] - truth["vertical_bias_m"]) < 0.02


def test_tilted_block_stands_out(coregistered_doc, truth):
    job = coregistered_doc["coregistration"]
    assert set(job["outlier_tiles"]) == set(truth["tilt"]["tiles"])
    tiles = {t["tile"]: t["coregistration"] for t in coregistered_doc["tiles"]}
    block = [tiles[t]["tilt_east_m_per_km"] for t in truth["tilt"]["tiles"]]
    others = [
        r["tilt_east_m_per_km"]
        for t, r in tiles.items()
        if r["status"] == "ok" and t not in truth["tilt"]["tiles"]
    ]
    # the block rises to the east; untilted tiles show no ramp
    assert min(block) > 0.3 and max(abs(v) for v in others) < 0.15


def test_statistics_after_coregistration_are_tighter(coregistered_doc):
    before = strata(coregistered_doc["overall_detail"])["landcover:open ground"]
    after = strata(coregistered_doc["coregistration"]["after"]["overall"])["landcover:open ground"]
    assert after["nmad"] < before["nmad"]
    assert abs(after["median"]) < 0.05  # bias removed


def test_tiles_that_cannot_estimate_say_why(coregistered_doc):
    reasons = [
        t["coregistration"]["reason"]
        for t in coregistered_doc["tiles"]
        if t["coregistration"]["status"] == "cannot_estimate"
    ]
    assert reasons and all(
        ("stable pixels" in r) or ("convergence" in r) or ("standard error" in r) for r in reasons
    )


def test_coregistration_is_in_the_zarr_store(coregistered_doc, coregistered_out):
    import xarray as xr

    tiles = xr.open_zarr(coregistered_out / "results.zarr", group="tiles")
    east = float(tiles["shift_east_m"].sel(tile="r26_E02_N00"))
    doc_tiles = {t["tile"]: t for t in coregistered_doc["tiles"]}
    assert east == pytest.approx(doc_tiles["r26_E02_N00"]["coregistration"]["east_m"])
    after = xr.open_zarr(coregistered_out / "results.zarr", group="after_coregistration")
    assert after.attrs["method"].startswith("median")
    assert after.attrs["east_m"] == pytest.approx(coregistered_doc["coregistration"]["east_m"])
    assert list(after["region"].values) == ["SU", "EW", "HF", "TC"]


def test_pooled_estimate_recovers_the_shift(dask_client, tmp_path, truth):
    # one Nuth & Kääb fit over every stable pixel; the tilted block pulls the bias (not checked)
    data = job_spec.load_spec_file(DEMO / "demo_coregistered.yaml")
    data["coregistration"] |= {"job_estimate": "pooled", "fit_elevation_bias": True}
    job = job_spec.resolve(job_spec.parse_spec(data), base_dir=DEMO)
    doc = run_job(job, tmp_path / "out", client=dask_client)
    pooled = doc["coregistration"]
    pixel = truth["test"]["pixel_size_m"]
    assert pooled["status"] == "ok" and pooled["converged"]
    assert abs(pooled["east_m"] - truth["shift"]["east_m"]) < 0.1 * pixel
    assert abs(pooled["north_m"] - truth["shift"]["north_m"]) < 0.1 * pixel
    assert "m_per_100m" in pooled["elevation_bias"]
    assert pooled["regions"]["HF"]["status"] == "cannot_estimate"  # flat fen


def test_baseline_with_applied_job_coregistration_recomputes_all(
    coregistered_doc, coregistered_out, dask_client, tmp_path
):
    spec = job_spec.parse_spec(job_spec.load_spec_file(DEMO / "demo_coregistered.yaml"))
    job = job_spec.resolve(spec, base_dir=DEMO)
    doc = run_job(job, tmp_path / "out", client=dask_client, baseline=coregistered_out)
    assert "recheck" not in doc
    assert any("baseline was not used" in c for c in doc["cautions"])
    assert doc["overall"] == pytest.approx(coregistered_doc["overall"])
