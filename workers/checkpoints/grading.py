"""Grading against published vertical accuracy standards (pure).

Each standard answers: which thresholds apply, were they met, with what numbers, and were the
checkpoints enough. Raster-vs-raster figures can be graded too, but only as an *indicative* grade:
the standards define checkpoint tests.

Sources (see also ../shared/CHECK_VALUES.md):
* NSSDA, FGDC-STD-007.3-1998 (published): Accuracy_z = 1.9600 RMSE_z; at least 20 checkpoints.
* ASPRS Positional Accuracy Standards, Edition 1 (2014): class 'X cm': RMSE_z (non-vegetated)
  <= X, NVA <= 1.96 X, VVA (95th percentile of |dh| in vegetated land) <= 3.00 X (Table 7.5,
  from memory); recommended checkpoints by project area up to 2,500 km^2, NVA and VVA apart
  (Annex C table, from memory: verify against the text); 100 checkpoints for the first
  2,500 km^2 and 5 more per further 500 km^2 (p. A20, published); checkpoints at least 3 times
  more accurate than the class (published).
* ASPRS Edition 2 (2023): classes by RMSE_V alone, no 95 % measures; the VVA is an RMSE_V of the
  vegetated checkpoints reported "as found", without pass/fail; at least 30 checkpoints; survey
  error folded in as RMSE_product = sqrt(RMSE_measured^2 + RMSE_survey^2) (change list
  published; the VVA as an RMSE, the formula and the factor 2 for survey accuracy from memory).
* USGS 3DEP Lidar Base Specification v2.1 (2019), absolute vertical accuracy by quality level
  (RMSE_z / NVA / VVA in cm): QL0 5.0/9.8/14.7, QL1 10.0/19.6/29.4, QL2 10.0/19.6/29.4,
  QL3 20.0/39.2/58.8 (values from memory; the editions before the specification adopted ASPRS
  Edition 2).

Cover groups: a checkpoint without a land-cover class is graded in the group the spec names
(``checkpoints.unclassified_group``, default non-vegetated, as unclassified pixels are). When no
checkpoint is vegetated, a VVA cannot be tested: the Edition 1 and quality-level grades are then
decided on the non-vegetated checks alone and say so (``scope``); the VVA check stays undecided.
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
#: Quality levels: (RMSE_z, NVA, VVA) in centimetres (USGS 3DEP Lidar Base Specification v2.1,
#: from memory).
QUALITY_LEVELS_CM: dict[str, tuple[float, float, float]] = {
    "QL0": (5.0, 9.8, 14.7),
    "QL1": (10.0, 19.6, 29.4),
    "QL2": (10.0, 19.6, 29.4),
    "QL3": (20.0, 39.2, 58.8),
}
QUALITY_LEVEL_SPEC = "USGS 3DEP Lidar Base Specification v2.1 (2019)"
NSSDA_MIN_CHECKPOINTS = 20
ASPRS2023_MIN_CHECKPOINTS = 30
ASPRS2014_SURVEY_RATIO = 3.0
ASPRS2023_SURVEY_RATIO = 2.0  # from memory
#: ASPRS 2014 Annex C, recommended vertical checkpoints by project area: (area up to, km^2;
#: NVA; VVA). From memory: verify against the text.
ASPRS2014_CHECKPOINTS_BY_AREA: tuple[tuple[float, int, int], ...] = (
    (500.0, 20, 5),
    (750.0, 20, 10),
    (1000.0, 25, 15),
    (1250.0, 30, 20),
    (1500.0, 35, 25),
    (1750.0, 40, 30),
    (2000.0, 45, 35),
    (2250.0, 50, 40),
    (2500.0, 55, 45),
)
VVA_NOT_TESTED = "not tested: no vegetated checkpoints"
SCOPE_NON_VEGETATED = (
    "decided on the non-vegetated checks only: no vegetated checkpoints, so the VVA was not tested"
)


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


@dataclass(frozen=True)
class CheckpointCounts:
    """Recommended checkpoints: NVA and VVA apart where the standard splits them, and in all."""

    nva: int | None
    vva: int | None
    total: int


def asprs2014_recommended_checkpoints(area_km2: float) -> CheckpointCounts:
    """ASPRS 2014: up to 2,500 km^2 the Annex C table by area (NVA and VVA apart); beyond,
    100 for the first 2,500 km^2 and 5 more per further 500 km^2 or part of it (total only)."""
    for up_to, nva, vva in ASPRS2014_CHECKPOINTS_BY_AREA:
        if area_km2 <= up_to:
            return CheckpointCounts(nva, vva, nva + vva)
    extra = area_km2 - 2500.0
    return CheckpointCounts(None, None, 100 + 5 * math.ceil(extra / 500.0))


def asprs2014_required_checkpoints(area_km2: float) -> int:
    """The total of :func:`asprs2014_recommended_checkpoints`."""
    return asprs2014_recommended_checkpoints(area_km2).total


def rmse_product(rmse_measured: float, rmse_survey: float) -> float:
    """ASPRS Edition 2: the product's RMSE with the checkpoint survey error folded in."""
    return math.hypot(rmse_measured, rmse_survey)


def _check(
    name: str, value: float | None, limit: float, unit: str = "m", *, tested: bool = True
) -> dict[str, Any]:
    met = value is not None and value <= limit
    out = {
        "measure": name,
        "value": value,
        "threshold": limit,
        "unit": unit,
        "met": met if value is not None else None,
    }
    if not tested:
        out["note"] = VVA_NOT_TESTED
    return out


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
    warnings = _asprs2014_count_warnings(m)
    warnings += _survey_warning(m.survey_rmse_m, x, ASPRS2014_SURVEY_RATIO, "ASPRS 2014")
    return _scoped(
        {
            "standard": "ASPRS Positional Accuracy Standards, Edition 1 (2014)",
            "class": f"{class_cm:g}-cm",
            "checks": checks,
            "met": _all_met(checks),
            "best_class_met": _best_class(m, edition=2014),
            "warnings": warnings,
        },
        m,
    )


def _asprs2014_count_warnings(m: Measured) -> list[str]:
    """Fewer checkpoints than ASPRS 2014 recommends for the area (NVA and VVA apart)."""
    if m.area_km2 is None:
        return []
    need = asprs2014_recommended_checkpoints(m.area_km2)
    where = f"over {m.area_km2:.1f} km^2"
    if need.nva is None or need.vva is None:
        have = m.count_non_vegetated + m.count_vegetated
        if have < need.total:
            return [f"{have} checkpoints; ASPRS 2014 asks for {need.total} {where}"]
        return []
    out = []
    if m.count_non_vegetated < need.nva:
        out.append(
            f"{m.count_non_vegetated} non-vegetated checkpoints; ASPRS 2014 (Annex C) "
            f"recommends {need.nva} for the NVA {where}"
        )
    if m.count_vegetated < need.vva:
        out.append(
            f"{m.count_vegetated} vegetated checkpoints; ASPRS 2014 (Annex C) recommends "
            f"{need.vva} for the VVA {where}"
        )
    return out


def _vva_tested(m: Measured) -> bool:
    return m.count_vegetated > 0


def _asprs2014_checks(m: Measured, x: float) -> list[dict[str, Any]]:
    nva = None if m.rmse_z_non_vegetated is None else NVA_FACTOR * m.rmse_z_non_vegetated
    return [
        _check("rmse_z_non_vegetated", m.rmse_z_non_vegetated, x),
        _check("nva_95", nva, NVA_FACTOR * x),
        _check("vva_95", m.vva_95, VVA_FACTOR * x, tested=_vva_tested(m)),
    ]


def grade_asprs2023(m: Measured, *, class_cm: float) -> dict[str, Any]:
    """ASPRS Edition 2 (2023): RMSE_V (with survey error folded in) <= X; the VVA is reported as
    found, an RMSE_V of the vegetated checkpoints (survey error folded in), without pass/fail."""
    x = class_cm / 100.0
    checks = [_check("rmse_v_non_vegetated_product", _product(m.rmse_z_non_vegetated, m), x)]
    warnings = _count_warning(m.count_non_vegetated, ASPRS2023_MIN_CHECKPOINTS, "ASPRS 2023")
    warnings += _survey_warning(m.survey_rmse_m, x, ASPRS2023_SURVEY_RATIO, "ASPRS 2023")
    return {
        "standard": "ASPRS Positional Accuracy Standards, Edition 2 (2023)",
        "class": f"{class_cm:g}-cm",
        "checks": checks,
        "met": _all_met(checks),
        "vva_rmse_v_as_found_m": _product(m.rmse_z_vegetated, m),
        "vva_note": "VVA reported as found (RMSE_V of the vegetated checkpoints, survey error "
        "folded in when stated); Edition 2 sets no VVA threshold"
        + ("" if _vva_tested(m) else "; " + VVA_NOT_TESTED),
        "best_class_met": _best_class(m, edition=2023),
        "warnings": warnings,
    }


def grade_quality_level(m: Measured, *, level: str) -> dict[str, Any]:
    """A lidar quality level: RMSE_z, NVA and VVA thresholds (cm)."""
    rmse_cm, nva_cm, vva_cm = QUALITY_LEVELS_CM[level]
    nva = None if m.rmse_z_non_vegetated is None else NVA_FACTOR * m.rmse_z_non_vegetated
    checks = [
        _check("rmse_z_non_vegetated", m.rmse_z_non_vegetated, rmse_cm / 100),
        _check("nva_95", nva, nva_cm / 100),
        _check("vva_95", m.vva_95, vva_cm / 100, tested=_vva_tested(m)),
    ]
    return _scoped(
        {
            "standard": f"{QUALITY_LEVEL_SPEC}, quality level {level}",
            "checks": checks,
            "met": _all_met(checks),
            "warnings": [],
        },
        m,
    )


def grade_user(m: Measured, requirements: Mapping[str, float]) -> dict[str, Any]:
    """A user-defined class: any of required_rmse_m, required_nva_m, required_vva_m.

    RMSE and NVA come from the non-vegetated checkpoints, or from every graded checkpoint when
    none is non-vegetated (the record names the basis): a user's class is never left ungraded
    for want of land cover."""
    rmse, basis = m.rmse_z_non_vegetated, "non-vegetated checkpoints"
    if m.count_non_vegetated == 0 and m.rmse_z_all is not None:
        rmse, basis = m.rmse_z_all, "all graded checkpoints (none is non-vegetated)"
    nva = None if rmse is None else NVA_FACTOR * rmse
    measured = {"rmse_m": rmse, "nva_m": nva, "vva_m": m.vva_95}
    checks = []
    for key, limit in requirements.items():
        name = key.removeprefix("required_")
        checks.append(_check(name, measured[name], limit, tested=name != "vva_m" or _vva_tested(m)))
    return _scoped(
        {
            "standard": "user-defined class",
            "rmse_basis": basis,
            "checks": checks,
            "met": _all_met(checks),
            "warnings": [],
        },
        m,
    )


def _scoped(entry: dict[str, Any], m: Measured) -> dict[str, Any]:
    """Say so when a grade was decided without its VVA check (no vegetated checkpoints)."""
    if any(c.get("note") == VVA_NOT_TESTED for c in entry["checks"]):
        entry["scope"] = SCOPE_NON_VEGETATED
        entry["warnings"] = [*entry["warnings"], SCOPE_NON_VEGETATED]
    return entry


def cover_group(
    landcover: int | None,
    groups: Mapping[int, str],
    *,
    unclassified_group: str = "non_vegetated",
) -> tuple[str, bool]:
    """The cover group a checkpoint is graded in, and whether it was unclassified.

    A point without a class, or with a class but no class table to read it by (no land-cover
    raster's classes), is unclassified and takes ``unclassified_group``; a listed class takes
    its group; a class the table does not list is 'unknown' and leaves grading (as pixels of
    unlisted values leave the raster statistics)."""
    if landcover is None or not groups:
        return unclassified_group, True
    return groups.get(landcover, "unknown"), False


def _all_met(checks: list[dict[str, Any]]) -> bool | None:
    """False if a tested check failed; None if one could not be computed; else True. A check
    not tested for want of vegetated checkpoints does not decide (the grade says so)."""
    values = [c["met"] for c in checks if c.get("note") != VVA_NOT_TESTED]
    if any(v is False for v in values):
        return False
    if not values or any(v is None for v in values):
        return None
    return True


def _best_class(m: Measured, *, edition: int) -> str | None:
    """The strictest standard class whose thresholds the measures meet (None: none of them)."""
    for class_cm in ASPRS_CLASSES_CM:
        x = class_cm / 100.0
        if edition == 2014:
            met = _all_met(_asprs2014_checks(m, x))
        else:
            met = _all_met([_check("rmse", _product(m.rmse_z_non_vegetated, m), x)])
        if met:
            return f"{class_cm:g}-cm"
    return None


def _product(rmse: float | None, m: Measured) -> float | None:
    """An RMSE with the checkpoint survey error folded in (ASPRS Edition 2), when stated."""
    if rmse is None:
        return None
    if m.survey_rmse_m is None:
        return rmse
    return rmse_product(rmse, m.survey_rmse_m)


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
