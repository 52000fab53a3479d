"""The error model in a job: spec section, re-check verdicts against uncertainties, the figure
(workers/uncertainty/error_model.py)."""

from __future__ import annotations

import numpy as np
import pytest

from demaudit.workers.uncertainty import error_model as em

PIXEL = 5.0


def test_a_change_within_the_combined_uncertainty_is_noise():
    from demaudit.workers.recheck.plan import Thresholds, compare

    before = {"count": 10**6, "median": 0.02, "nmad": 0.30}
    after = {"count": 10**6, "median": 0.10, "nmad": 0.36}  # both beyond the fixed thresholds
    limits = Thresholds()
    assert compare(before, after, limits)["verdict"] == "regressed"
    wide = {"median_se_m": 0.05, "nmad_se_m": 0.04}  # 1.96 x sqrt(2) x 0.05 = 0.139 > 0.08
    verdict = compare(before, after, limits, uncertainty_before=wide, uncertainty_after=wide)
    assert verdict["verdict"] == "within_noise" and verdict["flags"] == []
    assert len(verdict["noise"]) == 2
    # a median change beyond its noise still regresses, the NMAD change alone being noise
    narrow = {"median_se_m": 0.01, "nmad_se_m": 0.04}
    verdict = compare(before, after, limits, uncertainty_before=narrow, uncertainty_after=narrow)
    assert verdict["verdict"] == "regressed"
    assert verdict["flags"] == ["median moved 0.080 m away from zero"]
    # an improvement within noise is noise too; without uncertainties nothing changes
    verdict = compare(after, before, limits, uncertainty_before=wide, uncertainty_after=wide)
    assert verdict["verdict"] == "within_noise"
    assert compare(after, before, limits)["verdict"] == "improved"
    assert (
        compare(before, before, limits, uncertainty_before=wide, uncertainty_after=wide)["verdict"]
        == "unchanged"
    )


def test_the_spec_section_is_opt_in_with_defaults_and_checked():
    from demaudit.workers.errors import SpecError
    from demaudit.workers.spec import parse_spec
    from demaudit.workers.tile.task import TileOptions

    base = {"name": "j", "test": {"tiles": "t/*.tif"}, "reference": {"tiles": "r/*.tif"}}
    assert parse_spec(base).error_model is None
    assert TileOptions.from_spec(parse_spec(base)).error_model is None
    spec = parse_spec(base | {"error_model": {"seed": 3}})
    assert spec.error_model is not None
    assert (spec.error_model.max_distance_m, spec.error_model.samples_per_tile) == (5000.0, 2000)
    options = TileOptions.from_spec(spec).error_model
    assert options == em.ErrorModelOptions(seed=3, samples_per_tile=2000)
    with pytest.raises(SpecError, match="error_model.max_distance_m"):
        parse_spec(base | {"error_model": {"max_distance_m": -1}})
    with pytest.raises(SpecError, match="error_model.ranges"):
        parse_spec(base | {"error_model": {"ranges": 2}})


def test_the_change_report_judges_regions_against_their_uncertainty(tmp_path):
    from demaudit.service.run.recheck import Baseline, change_report
    from demaudit.workers.recheck.plan import ChangePlan, Thresholds

    def region(median: float, se: float | None) -> dict:
        entry = {"region": "HF", "stats": {"count": 185_759, "median": median, "nmad": 0.31}}
        if se is not None:
            entry["uncertainty"] = {"median_se_m": se, "nmad_se_m": 0.03}
        return entry

    def report(se: float | None) -> dict:
        baseline = Baseline(tmp_path, {"tiles": [], "regions": [region(0.24, se)]})
        document = {"tiles": [], "regions": [region(0.33, se)]}  # moved 0.09 m > 0.05 m
        return change_report(baseline, ChangePlan(), document, Thresholds())

    assert report(None)["regions"][0]["verdict"] == "regressed"
    assert report(None)["regressions"] == 1
    # 1.96 x sqrt(2) x 0.113 m (the demo's Harrow Fen) = 0.31 m: a 0.09 m move is noise
    noisy = report(0.113)
    assert noisy["regions"][0]["verdict"] == "within_noise" and noisy["regressions"] == 0
    assert report(0.01)["regions"][0]["verdict"] == "regressed"


def test_the_figure_is_drawn_from_the_summary_section_only_when_there_is_one():
    from types import SimpleNamespace

    from demaudit.workers.outputs.figures.error_model import build_error_model

    assert build_error_model(SimpleNamespace(document={"job": {"name": "j"}})) is None
    rng = np.random.default_rng(4)
    n = 300
    reference = np.tile(np.sin(np.arange(n) / 20.0) * 40, (n, 1))
    acc = em.ErrorModelAccumulator(max_points=20_000)
    for i in range(3):
        acc.add(
            em.tile_error_sample(
                rng.standard_normal((n, n)) * 0.3,
                reference=reference,
                landcover=None,
                classes=(),
                region_masks={},
                pixel_centres=lambda r, c, i=i: ((c + 0.5) * PIXEL + i * n * PIXEL, r * PIXEL),
                crs="EPSG:32632",
                pixel_size_m=(PIXEL, PIXEL),
                tile_id=f"t{i}",
                options=em.ErrorModelOptions(),
            )
        )
    section = em.fit_error_model(acc, max_distance_m=2000.0, seed=0).document()
    assert section["components"] == [] and section["nugget"] > 0  # white noise
    fig, meta = build_error_model(SimpleNamespace(document={"error_model": section}))
    assert len(fig.axes) == 2 and meta["models"] == ["dh"]
