"""Accuracy measures and grading against the published standards (../shared/CHECK_VALUES.md)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import norm

from workers import accuracy, grading
from workers.grading import Measured


def test_published_worked_example_rmse_and_accuracy():
    # USGS 3D Elevation Program vertical accuracy report of lidar project LA_Barataria_2013
    # (VA.txt, published): n = 51, mean = -0.00533333 m, sample std = 0.0577206 m gives
    # RMSE_z = 0.0574002 m and Accuracy_z = 0.1125044 m.
    rmse = accuracy.rmse_from_moments(51, -0.00533333, 0.0577206)
    assert rmse == pytest.approx(0.0574002, abs=5e-7)
    assert accuracy.NSSDA_FACTOR * rmse == pytest.approx(0.1125044, abs=1e-6)


def test_factors_against_the_normal_distribution():
    # NSSDA 1.9600 (FGDC-STD-007.3-1998, published) and LE90 1.6449: computed from the normal
    # distribution with scipy; Accuracy_z = 1.1916 LE90 (computed).
    assert pytest.approx(norm.ppf(0.975), abs=1e-4) == accuracy.NSSDA_FACTOR
    assert pytest.approx(norm.ppf(0.95), abs=1e-4) == accuracy.LE90_FACTOR
    assert pytest.approx(1.1916, abs=1e-4) == accuracy.NSSDA_FACTOR / accuracy.LE90_FACTOR


def test_residual_statistics_match_numpy():
    x = np.random.default_rng(2).normal(0.05, 0.1, 200)
    s = accuracy.residual_statistics(x)
    assert s["rmse"] == pytest.approx(np.sqrt(np.mean(x**2)))
    assert s["accuracy_z_95"] == pytest.approx(1.96 * s["rmse"])
    assert s["le90"] == pytest.approx(1.6449 * s["rmse"])
    assert s["q95_abs"] == pytest.approx(np.quantile(np.abs(x), 0.95))
    assert accuracy.residual_statistics([])["count"] == 0


def test_vva_is_95th_percentile_of_vegetated():
    veg = np.linspace(0, 1, 101)
    va = accuracy.vertical_accuracy([0.1, -0.1], veg)
    assert va["vva_95"] == pytest.approx(0.95)
    assert va["nva_95"] == pytest.approx(1.96 * 0.1)


@pytest.mark.parametrize(("class_cm", "rmse", "nva", "vva"), [(10.0, 0.10, 0.196, 0.30)])
def test_asprs2014_thresholds(class_cm, rmse, nva, vva):
    # ASPRS 2014, Table 7.5 (from memory): 10-cm class: 10.0 / 19.6 / 30 cm
    m = Measured(0.099, 0.299, 100, 50, survey_rmse_m=0.02)
    graded = grading.grade_asprs2014(m, class_cm=class_cm)
    limits = {c["measure"]: c["threshold"] for c in graded["checks"]}
    assert limits == pytest.approx({"rmse_z_non_vegetated": rmse, "nva_95": nva, "vva_95": vva})
    assert graded["met"] is True
    worse = grading.grade_asprs2014(Measured(0.101, 0.2, 100, 50, 0.02), class_cm=class_cm)
    assert worse["met"] is False
    veg_fails = grading.grade_asprs2014(Measured(0.05, 0.31, 100, 50, 0.02), class_cm=class_cm)
    assert veg_fails["met"] is False


def test_asprs2014_checkpoint_count():
    # ASPRS 2014 p. A20 (published): 100 for the first 2,500 km^2, then 5 per further 500 km^2
    assert grading.asprs2014_required_checkpoints(100) == 100
    assert grading.asprs2014_required_checkpoints(2500) == 100
    assert grading.asprs2014_required_checkpoints(3000) == 105
    assert grading.asprs2014_required_checkpoints(3001) == 110
    graded = grading.grade_asprs2014(Measured(0.05, 0.1, 60, 20, 0.02, area_km2=3000), class_cm=10)
    assert any("ASPRS 2014 asks for 105" in w for w in graded["warnings"])


def test_asprs2014_survey_must_be_three_times_better():
    # ASPRS 2014 (published): checkpoints at least 3 times more accurate than the data tested
    ok = grading.grade_asprs2014(Measured(0.05, 0.1, 100, 50, survey_rmse_m=0.033), class_cm=10)
    assert not any("survey" in w for w in ok["warnings"])
    weak = grading.grade_asprs2014(Measured(0.05, 0.1, 100, 50, survey_rmse_m=0.04), class_cm=10)
    assert any("3 times better" in w for w in weak["warnings"])


def test_asprs2023_folds_in_survey_error_and_needs_30_points():
    # ASPRS Edition 2 (2023): RMSE_product = sqrt(measured^2 + survey^2) (from memory); >= 30
    assert grading.rmse_product(0.09, 0.03) == pytest.approx(np.hypot(0.09, 0.03))
    graded = grading.grade_asprs2023(Measured(0.099, 0.5, 25, 10, survey_rmse_m=0.02), class_cm=10)
    assert graded["met"] is False  # hypot(0.099, 0.02) > 0.10
    assert graded["vva_95_reported_m"] == 0.5  # reported, not graded
    assert any("at least 30" in w for w in graded["warnings"])


def test_quality_levels_from_memory_table():
    # lidar base specification quality levels, RMSE_z / NVA / VVA in cm (from memory)
    expected = {
        "QL0": (5.0, 9.8, 14.7),
        "QL1": (10.0, 19.6, 29.4),
        "QL2": (10.0, 19.6, 29.4),
        "QL3": (20.0, 39.2, 58.8),
    }
    for level, cms in expected.items():
        graded = grading.grade_quality_level(Measured(0.0, 0.0, 100, 100), level=level)
        assert [c["threshold"] * 100 for c in graded["checks"]] == pytest.approx(list(cms))
        # NVA = 1.96 RMSE_z and VVA = 3.00 x (ASPRS 2014) hold in the table (QL0 VVA: 2.94)
        assert cms[1] == pytest.approx(1.96 * cms[0])


def test_nssda_statement_and_minimum_points():
    graded = grading.grade_nssda(Measured(0.0574002, None, 19, 0))
    assert graded["accuracy_z_95_m"] == pytest.approx(0.1125044, abs=1e-6)
    assert "at least 20" in graded["warnings"][0]


def test_user_class_and_best_class():
    m = Measured(0.12, 0.40, 100, 40, survey_rmse_m=0.02)
    user = grading.grade_user(m, {"required_rmse_m": 0.15, "required_vva_m": 0.35})
    assert user["met"] is False
    assert [c["met"] for c in user["checks"]] == [True, False]
    assert grading.grade_asprs2014(m, class_cm=10)["best_class_met"] == "15-cm"


def test_missing_vegetated_points_leave_vva_unknown_not_passed():
    graded = grading.grade_asprs2014(Measured(0.05, None, 100, 0, 0.01), class_cm=10)
    assert graded["met"] is None
