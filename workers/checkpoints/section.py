"""The checkpoints section of summary.json from the job's checkpoint rows (pure): residual
statistics overall, by land-cover class, cover group and region, the vertical accuracy, the
grades and the cautions they rest on."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
import shapely

from demaudit.workers.checkpoints import grading
from demaudit.workers.checkpoints.residuals import CheckpointRow, Rows
from demaudit.workers.inputs.catalog import TileInfo
from demaudit.workers.inputs.regions import Region
from demaudit.workers.spec import Grading, ResolvedJob
from demaudit.workers.stats.accuracy import residual_statistics, vertical_accuracy
from demaudit.workers.stats.merge import JobAccumulator
from demaudit.workers.stats.summary import statistics
from demaudit.workers.tile.strata import ClassInfo
from demaudit.workers.tile.task import ALL


@dataclass(frozen=True)
class SectionInputs:
    """What the section reads besides the rows: the spec's grading section, the cover group of
    unclassified points, the survey's own RMSE (metres, or None), the test tiles, the regions by
    test CRS, the file as shown and its SHA-256, and the residuals file's name."""

    grading: Grading
    unclassified_group: str
    survey_rmse_m: float | None
    tests: Sequence[TileInfo]
    regions: Mapping[str, list[Region]]
    shown_file: str | None
    fingerprint: str | None
    residuals_file: str


def unclassified_group_of(job: ResolvedJob) -> str:
    """The cover group an unclassified checkpoint is graded in (checkpoints.unclassified_group)."""
    spec = job.spec.checkpoints
    return (spec.unclassified_group if spec else None) or "non_vegetated"


def with_cover_groups(rows: Rows, classes: Sequence[ClassInfo], unclassified_group: str) -> Rows:
    """The used rows with the cover group each is graded in (workers/checkpoints/grading.py)."""
    group_of = {c.value: c.group for c in classes}
    return {
        key: _grouped_row(row, group_of, unclassified_group) if row.used else row
        for key, row in rows.items()
    }


def _grouped_row(
    row: CheckpointRow, group_of: Mapping[int, str], unclassified_group: str
) -> CheckpointRow:
    group, unclassified = grading.cover_group(
        row.landcover, group_of, unclassified_group=unclassified_group
    )
    return replace(row, cover_group=group, unclassified=unclassified)


def checkpoint_section(rows: Rows, given: SectionInputs) -> dict[str, Any]:
    """The summary's checkpoints section (rows: with their cover groups)."""
    used = [r for r in rows.values() if r.used]
    dh = np.array([r.dh_m for r in used])
    nv = np.array([r.dh_m for r in used if r.cover_group == "non_vegetated"])
    veg = np.array([r.dh_m for r in used if r.cover_group == "vegetated"])
    va = vertical_accuracy(nv, veg)
    cautions = cover_cautions(used, given.unclassified_group)
    return {
        "file": given.shown_file,
        "file_fingerprint": given.fingerprint,
        "survey_rmse_m": given.survey_rmse_m,
        "counts": {"read": len(rows), "used": len(used), "rejected": len(rows) - len(used)},
        "stats": residual_statistics(dh),
        "vertical_accuracy": va,
        "by_class": _grouped(used, lambda r: r.landcover),
        "by_cover_group": _grouped(used, lambda r: r.cover_group),
        "by_region": _by_region(used, dh, given),
        "grading": grade(
            _measured(va, len(nv), len(veg), given), given.grading, assumptions=cautions
        ),
        "cautions": cautions,
        "rejected": [{"id": r.id, "reason": r.reason} for r in rows.values() if not r.used],
        "residuals_file": given.residuals_file,
    }


def _measured(
    va: Mapping[str, Any], non_vegetated: int, vegetated: int, given: SectionInputs
) -> grading.Measured:
    area_km2 = sum((b[2] - b[0]) * (b[3] - b[1]) for b in (t.bounds for t in given.tests)) / 1e6
    return grading.Measured(
        _float(va["rmse_z_non_vegetated"]),
        _float(va["vva_95"]),
        non_vegetated,
        vegetated,
        survey_rmse_m=given.survey_rmse_m,
        area_km2=area_km2,
        rmse_z_vegetated=_float(va["rmse_z_vegetated"]),
        rmse_z_all=_float(va["rmse_z_all"]),
    )


def _by_region(
    used: Sequence[CheckpointRow], dh: np.ndarray, given: SectionInputs
) -> dict[str, Any]:
    """Residual statistics of the used points inside each region (test CRS)."""
    xs = np.array([r.x_test_crs for r in used])
    ys = np.array([r.y_test_crs for r in used])
    inside = {
        g.region_id: shapely.intersects_xy(g.geometry, xs, ys)
        for g in given.regions.get(given.tests[0].grid.crs, [])
    }
    return {
        region_id: residual_statistics(dh[mask]) for region_id, mask in inside.items() if mask.any()
    }


def _float(value: float | int | None) -> float | None:
    return None if value is None else float(value)


def cover_cautions(used: Sequence[CheckpointRow], unclassified_group: str) -> list[str]:
    """What the cover groups of the used checkpoints rest on, for cautions and grades."""
    out = []
    no_class = sum(bool(r.unclassified) and r.landcover is None for r in used)
    unread = sum(bool(r.unclassified) and r.landcover is not None for r in used)
    graded = (
        "left out of grading"
        if unclassified_group == "excluded"
        else f"graded as {unclassified_group.replace('_', '-')}"
    )
    rule = "(checkpoints.unclassified_group; unclassified pixels count as non-vegetated too)"
    if no_class:
        out.append(
            f"{no_class} of {len(used)} checkpoints have no land-cover class: {graded} {rule}"
        )
    if unread:
        out.append(
            f"{unread} of {len(used)} checkpoints have a land-cover class but the job lists no "
            f"land-cover classes to read it by (landcover.classes): {graded} {rule}"
        )
    unknown = sum(r.cover_group == "unknown" for r in used)
    if unknown:
        out.append(
            f"{unknown} of {len(used)} checkpoints have a land-cover class not listed in "
            "landcover.classes: left out of grading"
        )
    return out


def grade(
    measured: grading.Measured, g: Grading, *, assumptions: Sequence[str] = ()
) -> list[dict[str, Any]]:
    """Grade the measures against each standard the spec's grading section names; each grade
    repeats the assumptions its cover groups rest on."""
    out = []
    for standard in g.standards:
        if standard == "nssda":
            out.append(
                grading.grade_nssda(measured, required_accuracy_m=g.nssda_required_accuracy_m)
            )
        elif standard == "asprs2014":
            out.append(grading.grade_asprs2014(measured, class_cm=g.asprs_class_cm))
        elif standard == "asprs2023":
            out.append(grading.grade_asprs2023(measured, class_cm=g.asprs_class_cm))
        elif standard == "quality_level":
            out.append(grading.grade_quality_level(measured, level=g.quality_level))
        elif standard == "user" and g.user:
            out.append(grading.grade_user(measured, {str(k): v for k, v in g.user.items()}))
    for entry in out:
        if assumptions:
            entry["assumptions"] = list(assumptions)
        if measured.indicative:
            entry["indicative"] = True
            entry["note"] = (
                "graded on raster-vs-raster pixels: indicative only; the standards "
                "define checkpoint tests"
            )
    return out


def _grouped(used: Sequence[CheckpointRow], key: Any) -> dict[str, Any]:
    groups: dict[str, list[float]] = {}
    for r in used:
        groups.setdefault(str(key(r)), []).append(r.dh_m)  # type: ignore[arg-type]
    return {k: residual_statistics(v) for k, v in sorted(groups.items())}


def indicative_grading(acc: JobAccumulator, g: Grading) -> list[dict[str, Any]]:
    """Grades from raster-vs-raster pixels (non-vegetated RMSE, vegetated |dh| 95th percentile):
    indicative only. Without land cover every pixel counts as non-vegetated."""
    strata = acc.strata_of(ALL)
    nv = statistics(strata.get("cover_group:non_vegetated", acc.overall))
    veg_summary = strata.get("cover_group:vegetated")
    veg = statistics(veg_summary) if veg_summary is not None else {"q95_abs": None, "count": 0}
    measured = grading.Measured(
        nv["rmse"],
        veg["q95_abs"],
        int(nv["count"] or 0),  # type: ignore[arg-type]
        int(veg["count"] or 0),
        indicative=True,
        rmse_z_vegetated=veg.get("rmse"),
    )
    return grade(measured, g)
