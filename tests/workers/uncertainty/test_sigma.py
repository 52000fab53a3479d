"""sigma_dh(slope, curvature) fitted to binned NMADs (workers/uncertainty/sigma.py)."""

from __future__ import annotations

import numpy as np
import pytest

from demaudit.workers.uncertainty import sigma as sg

PIXEL = 5.0


def test_sigma_fit_recovers_a_slope_dependent_spread():
    centres = np.arange(1.0, 50.0, 2.0)
    truth = 0.3 + 0.5 * np.tan(np.radians(centres))
    model = sg.fit_sigma(centres, truth, np.full(centres.size, 1000.0))
    assert model(centres) == pytest.approx(truth, rel=1e-3)


def test_sigma_fit_separates_slope_and_curvature():
    rng = np.random.default_rng(1)
    slope = rng.uniform(0.0, 40.0, 200)
    curvature = rng.uniform(0.0, 2.0, 200)
    truth = 0.2 + 0.4 * np.tan(np.radians(slope)) ** 1.5 + 0.3 * curvature
    model = sg.fit_sigma(slope, truth, np.full(slope.size, 500.0), curvature)
    assert (model.a, model.b, model.c, model.d) == pytest.approx((0.2, 0.4, 1.5, 0.3), rel=1e-3)
    # one curvature only: the slope model alone, d = 0
    flat = sg.fit_sigma(slope, truth, np.full(slope.size, 500.0), np.full(slope.size, 0.7))
    assert flat.d == 0.0
