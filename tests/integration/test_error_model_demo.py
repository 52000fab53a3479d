"""The error model on the demo archive finds the slope-dependent noise its generator injected
(demo_tiles/truth.json: sigma = sigma_m + slope_factor * tan(slope), white noise)."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from demaudit.service.run.runner import run_job
from demaudit.workers import spec as job_spec

DEMO = Path(__file__).resolve().parents[2] / "demo_tiles"


@pytest.fixture(scope="module")
def doc(dask_client, tmp_path_factory) -> dict:
    raw = job_spec.load_spec_file(DEMO / "demo_coregistered.yaml")
    raw.pop("checkpoints", None)
    raw["error_model"] = {"max_distance_m": 3000, "seed": 4, "samples_per_tile": 1500}
    spec = job_spec.parse_spec(raw)
    out = tmp_path_factory.mktemp("error_model") / "out"
    return run_job(job_spec.resolve(spec, base_dir=DEMO), out, client=dask_client)


def injected(truth: dict, slope_deg: np.ndarray) -> np.ndarray:
    return truth["sigma_m"] + truth["slope_factor"] * np.tan(np.radians(slope_deg))


def test_sigma_by_slope_after_coregistration_shows_the_injected_noise(doc):
    truth = json.loads((DEMO / "truth.json").read_text())["noise"]
    model = doc["coregistration"]["after"]["error_model"]["sigma_by_slope"]
    rows = [r for r in model["bins"] if r["count"] >= 2000 and r["centre_deg"] <= 35]
    assert len(rows) >= 15
    centres = np.array([r["centre_deg"] for r in rows])
    nmad = np.array([r["nmad"] for r in rows])
    fitted = np.array([r["model_m"] for r in rows])
    # gentle slopes (< 8 degrees), where the injected noise dominates: the binned NMAD is the
    # generator's sigma within 5 %, and so is the model on flat ground (0-2 degrees)
    gentle = centres < 8
    assert gentle.sum() >= 4
    assert np.all(np.abs(nmad[gentle] / injected(truth, centres[gentle]) - 1) < 0.05)
    assert abs(fitted[0] / injected(truth, centres[:1])[0] - 1) < 0.05
    # steeper: at least the injected growth (the demo adds error of its own there: resampling
    # the reference over curved mountain terrain, see nmad_by_curvature), never less
    assert np.all(fitted >= 0.9 * injected(truth, centres))
    assert np.all(nmad >= 0.9 * injected(truth, centres))
    assert fitted[-1] > 2 * fitted[0]


def test_the_uncorrected_shift_shows_as_extra_slope_dependent_spread(doc):
    def binned(model: dict) -> float:
        rows = [r for r in model["sigma_by_slope"]["bins"] if 20 <= r["centre_deg"] <= 28]
        return sum(r["nmad"] * r["count"] for r in rows) / sum(r["count"] for r in rows)

    # the shift of truth.json adds |shift| x tan(slope) x |cos(aspect - direction)| to dh
    assert binned(doc["error_model"]) > 1.1 * binned(doc["coregistration"]["after"]["error_model"])


def test_white_demo_noise_is_mostly_nugget_and_regions_get_standard_errors(doc):
    after = doc["coregistration"]["after"]
    model = after["error_model"]
    assert model["nugget"] > 0.5 * model["total_sill"]  # the injected noise is white
    for region in [*doc["regions"], *after["regions"]]:
        u = region["uncertainty"]
        assert u["mean_se_m"] > 0 and u["median_se_m"] == pytest.approx(
            np.sqrt(np.pi / 2) * u["mean_se_m"]
        )
        # never narrower than the independent-pixel figure of the same pixels' sigma
        assert u["mean_se_m"] >= 0.99 * u["independent_pixels_mean_se_m"]
        assert region["confidence_95"]["label"] == "independent pixels"
        assert all("uncertainty" in s for s in region["strata"])
