"""The pooled job-wide estimate without a cluster: passes are a function of the correction."""

from __future__ import annotations

import numpy as np
import pytest

from demaudit.workers.coregistration.estimate import LinearFit
from demaudit.workers.coregistration.pooled import (
    PooledSettings,
    pooled_estimate,
    region_shifts,
)
from demaudit.workers.coregistration.tile import Correction, TileEquations
from demaudit.workers.stats import summary as dh_summary

TRUE_EAST, TRUE_NORTH, BIAS = 1.5, -0.75, 0.3  # metres
TILT_EAST, TILT_NORTH = 0.002, -0.001  # metres per metre
RNG = np.random.default_rng(3)
ROWS = RNG.normal(size=(500, 3))  # the shift fit's rows (north, east, constant)
PLANE = np.column_stack([np.ones(500), RNG.uniform(-500, 500, (500, 2))])


def _linear_world(at: Correction) -> TileEquations:
    """Equations whose solution is exactly the shift still to go (an ideal linear world)."""
    remaining = np.array([TRUE_NORTH - at.north_m, TRUE_EAST - at.east_m, 0.0])
    plane = PLANE @ np.array([BIAS, TILT_EAST, TILT_NORTH])
    return TileEquations(
        shift=LinearFit.of(ROWS, ROWS @ remaining),
        plane=LinearFit.of(PLANE, plane),
        stable_dh=dh_summary.summarise(np.full(300, BIAS)),
        regions={"R": LinearFit.of(ROWS, ROWS @ (remaining + [0.05, 0.1, 0.0]))},
    )


SETTINGS = PooledSettings(
    max_iterations=8, tolerance_px=0.01, fit_tilt=True, fit_elevation_bias=True
)


def test_an_exact_linear_world_converges_to_its_shift_bias_and_tilt():
    estimate = pooled_estimate(_linear_world, Correction(), pixel_m=2.0, settings=SETTINGS)
    report, at = estimate.report, estimate.correction
    assert at is not None and report["status"] == "ok" and report["converged"]
    # one step reaches the shift; the second finds no update left
    assert report["iterations"] == 2
    assert (at.east_m, at.north_m) == pytest.approx((TRUE_EAST, TRUE_NORTH))
    assert at.vertical_m == pytest.approx(BIAS, abs=0.01)  # summarised median (bin width)
    assert (at.tilt_east, at.tilt_north) == pytest.approx((TILT_EAST, TILT_NORTH))
    assert report["tilt"]["east_m_per_km"] == pytest.approx(TILT_EAST * 1000)
    # no elevation equations: the fit says why instead of failing the estimate
    assert report["elevation_bias"]["status"] == "cannot_estimate"
    # the region's one-step update (0.1 m east, 0.05 m north) is added to the job's shift
    assert report["regions"]["R"]["east_m"] == pytest.approx(TRUE_EAST + 0.1)
    assert report["regions"]["R"]["north_m"] == pytest.approx(TRUE_NORTH + 0.05)


def test_a_pass_without_enough_stable_pixels_cannot_estimate():
    def empty(at: Correction) -> TileEquations:
        return TileEquations()

    estimate = pooled_estimate(empty, Correction(), pixel_m=2.0, settings=SETTINGS)
    assert estimate.correction is None
    assert estimate.report["status"] == "cannot_estimate" and estimate.report["method"] == "pooled"
    assert "stable pixels" in estimate.report["reason"]


def test_a_large_region_update_is_refused():
    # 3 px (6 m at 2 m pixels) > MAX_REGION_UPDATE_PX = 2
    eq = TileEquations(regions={"R": LinearFit.of(ROWS, ROWS @ np.array([0.0, 6.0, 0.0]))})
    out = region_shifts(eq, Correction(), 2.0)
    assert out["R"]["status"] == "cannot_estimate" and "3.0 px" in out["R"]["reason"]
