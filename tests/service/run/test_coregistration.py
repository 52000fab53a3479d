"""The job-wide shift from the tiles' own estimates: its standard error against a Monte Carlo."""

from __future__ import annotations

import numpy as np
import pytest

from demaudit.service.run.coregistration import (
    MEDIAN_SE_FACTOR,
    _tile_median,
    median_standard_error,
)
from demaudit.workers.coregistration.tile import Correction

KEYS = ("east_m", "north_m", "vertical_m", "tilt_east_m_per_km", "tilt_north_m_per_km")


@pytest.mark.parametrize("n", [41, 101, 401])
def test_median_standard_error_factor_matches_monte_carlo(n):
    # the standard error of the median of n normal values is sqrt(pi / 2) sigma / sqrt(n)
    # asymptotically (textbook: the median's efficiency is 2 / pi); numpy Monte Carlo
    rng = np.random.default_rng(n)
    sigma = 0.7
    medians = np.median(rng.normal(3.0, sigma, (20_000, n)), axis=1)
    assert abs(MEDIAN_SE_FACTOR - 1.2533) < 1e-4
    assert MEDIAN_SE_FACTOR * sigma / np.sqrt(n) == pytest.approx(medians.std(), rel=0.03)


def test_median_standard_error_of_samples_matches_monte_carlo():
    # the NMAD-based estimate from each sample, on average, equals the medians' real spread
    rng = np.random.default_rng(5)
    samples = rng.normal(0.0, 2.0, (20_000, 101))
    estimates = [median_standard_error(s) for s in samples]
    assert np.mean(estimates) == pytest.approx(np.median(samples, axis=1).std(), rel=0.03)
    assert np.isnan(median_standard_error(np.array([])))


def test_tile_median_standard_errors_match_the_spread_of_job_estimates():
    # repeat the job estimate over many sets of 41 tiles whose estimates scatter normally: the
    # reported *_se values must equal the spread of the reported medians (numpy Monte Carlo)
    rng = np.random.default_rng(11)
    truth = {"east_m": 1.6, "north_m": -0.9, "vertical_m": 0.25}
    truth |= {"tilt_east_m_per_km": 0.1, "tilt_north_m_per_km": -0.2}
    scatter = {"east_m": 0.4, "north_m": 0.3, "vertical_m": 0.05}
    scatter |= {"tilt_east_m_per_km": 0.02, "tilt_north_m_per_km": 0.03}
    jobs = []
    for _ in range(3_000):
        records = {
            f"t{i}": {"status": "ok"} | {k: truth[k] + rng.normal(0, scatter[k]) for k in KEYS}
            for i in range(41)
        }
        correction, report = _tile_median(records, Correction(), fit_tilt=True)
        assert correction is not None and report["status"] == "ok"
        jobs.append(report)
    for key, se_key in [
        ("east_m", "east_se_m"),
        ("north_m", "north_se_m"),
        ("vertical_m", "vertical_se_m"),
        ("tilt_east_m_per_km", "tilt_east_m_per_km_se"),
    ]:
        spread = np.std([j[key] for j in jobs])
        stated = np.mean([j[se_key] for j in jobs])
        # NMAD / sqrt(n) (without sqrt(pi / 2)) states ~ 0.78 of the real spread
        assert stated == pytest.approx(spread, rel=0.05), key
