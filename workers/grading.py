"""Grading against published vertical accuracy standards (pure).

Each standard answers: which thresholds apply, were they met, with what numbers, and were the
checkpoints enough. Raster-vs-raster figures can be graded too, but only as an *indicative* grade:
the standards define checkpoint tests.

Sources (see also ../shared/CHECK_VALUES.md):
* NSSDA, FGDC-STD-007.3-1998 (published): Accuracy_z = 1.9600 RMSE_z; at least 20 checkpoints.
* ASPRS Positional Accuracy Standards, Edition 1 (2014): class 'X cm': RMSE_z (non-vegetated)
  <= X, NVA <= 1.96 X, VVA <= 3.00 X (Table 7.5, from memory); 100 checkpoints for the first
  2,500 km^2 and 5 more per further 500 km^2 (published); checkpoints at least 3 times more
  accurate than the class (published).
* ASPRS Edition 2 (2023): classes by RMSE_V alone, no 95 % measures, VVA reported without
  pass/fail, at least 30 checkpoints, survey error folded in as
  RMSE_product = sqrt(RMSE_measured^2 + RMSE_survey^2) (change list published; formula and the
  factor 2 for survey accuracy from memory).
* Lidar base-specification quality levels (RMSE_z / NVA / VVA in cm): QL0 5.0/9.8/14.7,
  QL1 10.0/19.6/29.4, QL2 10.0/19.6/29.4, QL3 20.0/39.2/58.8 (from memory).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

NVA_FACTOR = 1.96
VVA_FACTOR = 3.00
#: Standard ASPRS vertical classes in centimetres (from memory of the 2014 tables).
ASPRS_CLASSES_CM = (1.0, 2.5, 5.0, 10.0, 15.0, 20.0, 33.3, 66.7, 100.0, 333.3)
#: Quality levels: (RMSE_z, NVA, VVA) in centimetres (from memory).
QUALITY_LEVELS_CM: dict[str, tuple[float, float, float]] = {
    "QL0": (5.0, 9.8, 14.7),
    "QL1": (10.0, 19.6, 29.4),
    "QL2": (10.0, 19.6, 29.4),
    "QL3": (20.0, 39.2, 58.8),
}
NSSDA_MIN_CHECKPOINTS = 20
ASPRS2023_MIN_CHECKPOINTS = 30
ASPRS2014_SURVEY_RATIO = 3.0
ASPRS2023_SURVEY_RATIO = 2.0  # from memory


@dataclass(frozen=True)
class Measured:
    """What a grade is computed from (metres): non-vegetated RMSE_z and VVA, with counts, the
    checkpoints' stated survey accuracy and the audited area."""

    rmse_z_non_vegetated: float | None
    vva_95: float | None
    count_non_vegetated: int
    count_vegetated: int
    survey_rmse_m: float | None = None
    area_km2: float | None = None
    indicative: bool = False  # True for raster-vs-raster figures
    rmse_z_vegetated: float | None = None  # ASPRS Edition 2 reports the VVA as an RMSE
    rmse_z_all: float | None = None  # every graded checkpoint, whatever its cover group


def asprs2014_required_checkpoints(area_km2: float) -> int:
    """100 for the first 2,500 km^2, then 5 more per further 500 km^2 (or part of it)."""
    extra = max(area_km2 - 2500.0, 0.0)
    return 100 + 5 * math.ceil(extra / 500.0)


def rmse_product(rmse_measured: float, rmse_survey: float) -> float:
    """ASPRS Edition 2: the product's RMSE with the checkpoint survey error folded in."""
    return math.hypot(rmse_measured, rmse_survey)


def _check(name: str, value: float | None, limit: float, unit: str = "m") -> dict[str, Any]:
    met = value is not None and value <= limit
    return {
        "measure": name,
        "value": value,
        "threshold": limit,
        "unit": unit,
        "met": met if value is not None else None,
    }


def grade_nssda(m: Measured, *, required_accuracy_m: float | None = None) -> dict[str, Any]:
    """NSSDA: the tested vertical accuracy at 95 % (non-vegetated RMSE_z x 1.9600)."""
    acc = None if m.rmse_z_non_vegetated is None else 1.9600 * m.rmse_z_non_vegetated
    out: dict[str, Any] = {
        "standard": "NSSDA (FGDC-STD-007.3-1998)",
        "accuracy_z_95_m": acc,
        "statement": None
        if acc is None
        else f"Tested {acc:.3f} m vertical accuracy at 95 % confidence level",
        "warnings": _count_warning(m.count_non_vegetated, NSSDA_MIN_CHECKPOINTS, "NSSDA"),
    }
    if required_accuracy_m is not None:
        out["checks"] = [_check("accuracy_z_95", acc, required_accuracy_m)]
        out["met"] = _all_met(out["checks"])
    return out


def grade_asprs2014(m: Measured, *, class_cm: float) -> dict[str, Any]:
    """ASPRS Edition 1 (2014): RMSE_z <= X, NVA <= 1.96 X, VVA <= 3.00 X for class X cm."""
    x = class_cm / 100.0
    checks = _asprs2014_checks(m, x)
    warnings = []
    if m.area_km2 is not None:
        need = asprs2014_required_checkpoints(m.area_km2)
        have = m.count_non_vegetated + m.count_vegetated
        if have < need:
            warnings.append(
                f"{have} checkpoints; ASPRS 2014 asks for {need} over {m.area_km2:.1f} km^2"
            )
    warnings += _survey_warning(m.survey_rmse_m, x, ASPRS2014_SURVEY_RATIO, "ASPRS 2014")
    return {
        "standard": "ASPRS Positional Accuracy Standards, Edition 1 (2014)",
        "class": f"{class_cm:g}-cm",
        "checks": checks,
        "met": _all_met(checks),
        "best_class_met": _best_class(m, edition=2014),
        "warnings": warnings,
    }


def _asprs2014_checks(m: Measured, x: float) -> list[dict[str, Any]]:
    nva = None if m.rmse_z_non_vegetated is None else NVA_FACTOR * m.rmse_z_non_vegetated
    return [
        _check("rmse_z_non_vegetated", m.rmse_z_non_vegetated, x),
        _check("nva_95", nva, NVA_FACTOR * x),
        _check("vva_95", m.vva_95, VVA_FACTOR * x),
    ]


def grade_asprs2023(m: Measured, *, class_cm: float) -> dict[str, Any]:
    """ASPRS Edition 2 (2023): RMSE_V (with survey error folded in) <= X; VVA reported only."""
    x = class_cm / 100.0
    rmse = m.rmse_z_non_vegetated
    if rmse is not None and m.survey_rmse_m is not None:
        rmse = rmse_product(rmse, m.survey_rmse_m)
    checks = [_check("rmse_v_non_vegetated_product", rmse, x)]
    warnings = _count_warning(m.count_non_vegetated, ASPRS2023_MIN_CHECKPOINTS, "ASPRS 2023")
    warnings += _survey_warning(m.survey_rmse_m, x, ASPRS2023_SURVEY_RATIO, "ASPRS 2023")
    return {
        "standard": "ASPRS Positional Accuracy Standards, Edition 2 (2023)",
        "class": f"{class_cm:g}-cm",
        "checks": checks,
        "met": _all_met(checks),
        "vva_95_reported_m": m.vva_95,
        "best_class_met": _best_class(m, edition=2023),
        "warnings": warnings,
    }


def grade_quality_level(m: Measured, *, level: str) -> dict[str, Any]:
    """A lidar quality level: RMSE_z, NVA and VVA thresholds (cm, from memory)."""
    rmse_cm, nva_cm, vva_cm = QUALITY_LEVELS_CM[level]
    nva = None if m.rmse_z_non_vegetated is None else NVA_FACTOR * m.rmse_z_non_vegetated
    checks = [
        _check("rmse_z_non_vegetated", m.rmse_z_non_vegetated, rmse_cm / 100),
        _check("nva_95", nva, nva_cm / 100),
        _check("vva_95", m.vva_95, vva_cm / 100),
    ]
    return {
        "standard": f"lidar quality level {level} (thresholds from memory)",
        "checks": checks,
        "met": _all_met(checks),
        "warnings": [],
    }


def grade_user(m: Measured, requirements: Mapping[str, float]) -> dict[str, Any]:
    """A user-defined class: any of required_rmse_m, required_nva_m, required_vva_m."""
    nva = None if m.rmse_z_non_vegetated is None else NVA_FACTOR * m.rmse_z_non_vegetated
    measured = {"rmse_m": m.rmse_z_non_vegetated, "nva_m": nva, "vva_m": m.vva_95}
    checks = [
        _check(key.removeprefix("required_"), measured[key.removeprefix("required_")], limit)
        for key, limit in requirements.items()
    ]
    return {
        "standard": "user-defined class",
        "checks": checks,
        "met": _all_met(checks),
        "warnings": [],
    }


def _all_met(checks: list[dict[str, Any]]) -> bool | None:
    values = [c["met"] for c in checks]
    if any(v is False for v in values):
        return False
    if any(v is None for v in values):
        return None  # a measure could not be computed (e.g. no vegetated checkpoints)
    return True


def _best_class(m: Measured, *, edition: int) -> str | None:
    """The strictest standard class whose thresholds the measures meet (None: none of them)."""
    for class_cm in ASPRS_CLASSES_CM:
        x = class_cm / 100.0
        if edition == 2014:
            met = _all_met(_asprs2014_checks(m, x))
        else:
            met = _all_met([_check("rmse", _product(m), x)])
        if met:
            return f"{class_cm:g}-cm"
    return None


def _product(m: Measured) -> float | None:
    if m.rmse_z_non_vegetated is None:
        return None
    if m.survey_rmse_m is None:
        return m.rmse_z_non_vegetated
    return rmse_product(m.rmse_z_non_vegetated, m.survey_rmse_m)


def _count_warning(have: int, need: int, standard: str) -> list[str]:
    if have < need:
        return [f"only {have} non-vegetated checkpoints; {standard} asks for at least {need}"]
    return []


def _survey_warning(survey: float | None, class_m: float, ratio: float, standard: str) -> list[str]:
    if survey is None:
        return [
            f"checkpoint survey accuracy not stated; {standard} asks for checkpoints "
            f"{ratio:g} times more accurate than the class"
        ]
    if survey * ratio > class_m + 1e-12:
        return [
            f"checkpoint survey RMSE {survey:.3f} m is not {ratio:g} times better than the "
            f"{class_m * 100:g}-cm class ({standard})"
        ]
    return []
