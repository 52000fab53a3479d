"""Accuracy measures and grading against the published standards (../shared/CHECK_VALUES.md)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import norm

from demaudit.workers.checkpoints import grading
from demaudit.workers.checkpoints.grading import Measured
from demaudit.workers.stats import accuracy


def test_published_worked_example_rmse_and_accuracy():
    # USGS 3D Elevation Program vertical accuracy report of lidar project LA_Barataria_2013
    # (VA.txt, published): n = 51, mean = -0.00533333 m, sample std = 0.0577206 m gives
    # RMSE_z = 0.0574002 m and Accuracy_z = 0.1125044 m.
    # 51 residuals built to have exactly that mean and sample std (the report lists moments)
    z = np.random.default_rng(51).normal(size=51)
    residuals = -0.00533333 + 0.0577206 * (z - z.mean()) / z.std(ddof=1)
    rmse = accuracy.residual_statistics(residuals)["rmse"]
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
    assert s["le90_gaussian"] == pytest.approx(1.6449 * s["rmse"])
    assert s["le90"] == s["le90_gaussian"]  # kept for readers of earlier outputs
    assert s["q95_abs"] == pytest.approx(np.quantile(np.abs(x), 0.95))
    assert accuracy.residual_statistics([])["count"] == 0


def test_vva_is_95th_percentile_of_vegetated():
    # ASPRS 2014 (from memory): VVA = 95th percentile of |dh| (numpy.quantile as reference);
    # ASPRS Edition 2: the vegetated RMSE_z
    veg = np.linspace(0, 1, 101)
    va = accuracy.vertical_accuracy([0.1, -0.1], veg)
    assert va["vva_95"] == pytest.approx(0.95)
    assert va["nva_95"] == pytest.approx(1.96 * 0.1)
    assert va["rmse_z_vegetated"] == pytest.approx(np.sqrt(np.mean(veg**2)))
    both = np.concatenate([[0.1, -0.1], veg])
    assert va["rmse_z_all"] == pytest.approx(np.sqrt(np.mean(both**2)))


def test_le90_gaussian_and_empirical():
    # LE90 = 1.6449 RMSE_z holds for normal errors only (computed from the normal
    # distribution); le90_empirical is numpy.quantile(|dh|, 0.90) (reference library).
    skewed = np.concatenate([np.zeros(95), np.full(5, 10.0)])
    s = accuracy.residual_statistics(skewed)
    assert s["le90_empirical"] == pytest.approx(np.quantile(np.abs(skewed), 0.90)) == 0.0
    assert s["le90_gaussian"] == pytest.approx(1.6449 * np.sqrt(0.05 * 100.0))
    normal = np.random.default_rng(5).normal(0.0, 0.2, 200_000)
    s = accuracy.residual_statistics(normal)
    assert s["le90_empirical"] == pytest.approx(s["le90_gaussian"], rel=0.01)


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
    assert grading.asprs2014_required_checkpoints(2500) == 100
    assert grading.asprs2014_required_checkpoints(3000) == 105
    assert grading.asprs2014_required_checkpoints(3001) == 110
    graded = grading.grade_asprs2014(Measured(0.05, 0.1, 60, 20, 0.02, area_km2=3000), class_cm=10)
    assert any("ASPRS 2014 asks for 105" in w for w in graded["warnings"])


# ASPRS 2014 Annex C, recommended vertical checkpoints by project area (NVA + VVA), from
# memory: verify against the text (../shared/CHECK_VALUES.md).
ANNEX_C_FROM_MEMORY = [
    (1.0, 20, 5),
    (500.0, 20, 5),
    (500.5, 20, 10),
    (750.0, 20, 10),
    (1000.0, 25, 15),
    (1250.0, 30, 20),
    (1500.0, 35, 25),
    (1750.0, 40, 30),
    (2000.0, 45, 35),
    (2250.0, 50, 40),
    (2500.0, 55, 45),
]


@pytest.mark.parametrize(("area", "nva", "vva"), ANNEX_C_FROM_MEMORY)
def test_asprs2014_recommended_counts_below_2500_km2(area, nva, vva):
    # ASPRS 2014 Annex C table (from memory: verify against the text)
    need = grading.asprs2014_recommended_checkpoints(area)
    assert (need.nva, need.vva, need.total) == (nva, vva, nva + vva)


def test_asprs2014_nva_and_vva_minima_are_checked_apart():
    # ASPRS 2014 Annex C (from memory: verify against the text): 100 km^2 -> 20 NVA + 5 VVA.
    # 25 checkpoints in all, but only 3 vegetated: the VVA minimum is not met
    graded = grading.grade_asprs2014(Measured(0.05, 0.1, 22, 3, 0.02, area_km2=100), class_cm=10)
    assert any("3 vegetated checkpoints" in w and "recommends 5" in w for w in graded["warnings"])
    assert not any("non-vegetated checkpoints;" in w for w in graded["warnings"])
    few_nva = grading.grade_asprs2014(Measured(0.05, 0.1, 19, 6, 0.02, area_km2=100), class_cm=10)
    assert any("recommends 20 for the NVA" in w for w in few_nva["warnings"])
    enough = grading.grade_asprs2014(Measured(0.05, 0.1, 20, 5, 0.02, area_km2=100), class_cm=10)
    assert not any("recommends" in w for w in enough["warnings"])


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
    assert any("at least 30" in w for w in graded["warnings"])
    met = grading.grade_asprs2023(Measured(0.095, 0.5, 40, 10, survey_rmse_m=0.02), class_cm=10)
    assert met["met"] is True  # hypot(0.095, 0.02) = 0.0971 <= 0.10


def test_asprs2023_reports_vva_as_an_rmse_as_found_without_pass_fail():
    # ASPRS Edition 2 (2023): no 95 % measures; the VVA is an RMSE_V reported as found, with no
    # pass/fail (change list published; the RMSE form and the survey fold-in from memory)
    m = Measured(0.05, 0.90, 40, 30, survey_rmse_m=0.02, rmse_z_vegetated=0.40)
    graded = grading.grade_asprs2023(m, class_cm=10)
    assert graded["vva_rmse_v_as_found_m"] == pytest.approx(np.hypot(0.40, 0.02))
    assert [c["measure"] for c in graded["checks"]] == ["rmse_v_non_vegetated_product"]
    assert graded["met"] is True  # a poor vegetated RMSE does not fail Edition 2
    assert "vva_95" not in str(graded) and "95" not in graded["vva_note"]
    # Edition 1 keeps the 95th percentile and fails on it (ASPRS 2014 Table 7.5, from memory)
    assert grading.grade_asprs2014(m, class_cm=10)["met"] is False
    # vegetated RMSE without a stated survey accuracy: as measured
    bare = grading.grade_asprs2023(Measured(0.05, 0.9, 40, 30, rmse_z_vegetated=0.4), class_cm=10)
    assert bare["vva_rmse_v_as_found_m"] == 0.4


def test_quality_levels_from_memory_table():
    # USGS 3DEP Lidar Base Specification v2.1 quality levels, RMSE_z / NVA / VVA in cm (from
    # memory); the label names the specification and edition instead of "from memory"
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
        label = graded["standard"]
        assert "Lidar Base Specification v2.1 (2019)" in label and level in label
        assert "memory" not in label


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


def test_missing_vegetated_points_leave_vva_untested_and_say_so():
    # ASPRS 2014 (Table 7.5, from memory): with no vegetated checkpoints the VVA cannot be
    # tested; the grade is decided on the non-vegetated checks and says so, the VVA stays open
    graded = grading.grade_asprs2014(Measured(0.05, None, 100, 0, 0.01), class_cm=10)
    vva = next(c for c in graded["checks"] if c["measure"] == "vva_95")
    assert vva["met"] is None and vva["note"] == grading.VVA_NOT_TESTED
    assert graded["met"] is True
    assert graded["scope"] == grading.SCOPE_NON_VEGETATED
    assert grading.SCOPE_NON_VEGETATED in graded["warnings"]
    assert graded["best_class_met"] == "5-cm"
    # the non-vegetated checks still fail a stricter class
    assert grading.grade_asprs2014(Measured(0.05, None, 100, 0, 0.01), class_cm=2.5)["met"] is False
    # with vegetated checkpoints the VVA decides as before
    assert "scope" not in grading.grade_asprs2014(Measured(0.05, 0.1, 100, 5, 0.01), class_cm=10)
    ql = grading.grade_quality_level(Measured(0.05, None, 100, 0), level="QL2")
    assert ql["met"] is True and ql["scope"] == grading.SCOPE_NON_VEGETATED


def test_no_non_vegetated_rmse_leaves_the_grade_undecided():
    assert grading.grade_asprs2014(Measured(None, 0.2, 0, 30, 0.01), class_cm=10)["met"] is None


def test_user_rmse_class_is_graded_without_land_cover():
    # common practice: a user's RMSE requirement applies to the checkpoints at hand; with none
    # non-vegetated (all vegetated here), the RMSE of every graded checkpoint is used and named
    m = Measured(None, 0.30, 0, 30, rmse_z_vegetated=0.12, rmse_z_all=0.12)
    user = grading.grade_user(m, {"required_rmse_m": 0.15})
    assert user["checks"][0]["value"] == 0.12 and user["met"] is True
    assert "all graded checkpoints" in user["rmse_basis"]
    nv = grading.grade_user(Measured(0.2, None, 30, 0, rmse_z_all=0.2), {"required_rmse_m": 0.15})
    assert nv["met"] is False and nv["rmse_basis"] == "non-vegetated checkpoints"


@pytest.mark.parametrize(
    ("landcover", "groups", "default", "expected"),
    [
        (None, {}, "non_vegetated", ("non_vegetated", True)),  # plain id/x/y/height
        (2, {}, "non_vegetated", ("non_vegetated", True)),  # a class but no table to read it
        (None, {1: "non_vegetated"}, "vegetated", ("vegetated", True)),  # the spec's choice
        (None, {1: "non_vegetated"}, "excluded", ("excluded", True)),
        (2, {1: "non_vegetated", 2: "vegetated"}, "non_vegetated", ("vegetated", False)),
        (9, {1: "non_vegetated"}, "non_vegetated", ("unknown", False)),  # unlisted class
    ],
)
def test_cover_group_of_a_checkpoint(landcover, groups, default, expected):
    # unclassified points follow unclassified pixels (non-vegetated by default): our rule
    assert grading.cover_group(landcover, groups, unclassified_group=default) == expected


def test_spec_names_the_group_of_unclassified_checkpoints():
    from pydantic import ValidationError

    from demaudit.workers.spec import CheckpointSource

    base = {"file": "cp.csv", "vertical_crs": "EPSG:5773"}
    assert CheckpointSource(**base).unclassified_group == "non_vegetated"
    chosen = CheckpointSource(**base, unclassified_group="excluded")
    assert chosen.unclassified_group == "excluded"
    with pytest.raises(ValidationError, match="unclassified_group"):
        CheckpointSource(**base, unclassified_group="forest")
