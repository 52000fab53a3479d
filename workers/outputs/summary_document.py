"""Assemble the JSON summary of a job (pure): statistics, tile statuses, bounds and cautions."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

from demaudit.workers.checkpoints.grading import QUALITY_LEVELS_CM
from demaudit.workers.spec import Grading
from demaudit.workers.stats import summary as dh_summary
from demaudit.workers.stats.bins import LINEAR_WIDTH_M, RELATIVE_WIDTH
from demaudit.workers.stats.robust import confidence_intervals, nmad_interval, without_outliers
from demaudit.workers.stats.summary import DhSummary

SIGN = "test minus reference"

CAUTIONS_ALWAYS = (
    "These statistics support, but do not replace, acceptance of the release under the contract's "
    "specification and local regulations, and the judgement of a licensed surveyor.",
    "dh compares the test model with the reference, which has errors of its own; the statistics "
    "describe their difference, and equal the test model's accuracy only where the reference is "
    "much more accurate.",
    "A surface model (canopy, roofs) compared with a bare-earth terrain model shows vegetation and "
    "buildings as positive dh; judge accuracy on open ground.",
)


def quantile_resolution(overall: Mapping[str, Any] | None = None) -> dict[str, Any]:
    """The accuracy of the robust statistics read from the mergeable summaries: how it is
    bounded, and the bounds of the job's overall figures (metres); each area's own are in its
    ``resolution_m``."""
    return {
        "method": "per statistic, from the histogram bins holding the two order statistics it "
        "interpolates: (1 - g) x width_j + g x width_(j+1); nmad adds the median's bound "
        "(see workers/stats/summary.py)",
        "overall": dict(overall) if overall is not None else None,
        "bin_width_m": LINEAR_WIDTH_M,
        "relative_bin_width_beyond_2m": RELATIVE_WIDTH,
        "count_mean_std_rmse_min_max": "exact",
    }


def stratum_entry(key: str, part: DhSummary) -> dict[str, Any]:
    """A stratum's statistics and the 95 % interval of its NMAD (robust.nmad_interval: asymptotic
    standard error at the Gaussian, independent pixels; None below 2 values), as the figures
    show it."""
    stats = dh_summary.statistics(part)
    nmad = stats["nmad"]
    ci = nmad_interval(float(nmad), part.count) if nmad is not None else None
    return {"stratum": key, "stats": stats, "nmad_ci_95": list(ci) if ci else None}


def area_entry(
    s: DhSummary, strata: Mapping[str, DhSummary], *, outlier_rule: str, outlier_factor: float
) -> dict[str, Any]:
    """Statistics of one area (a region or the whole job): all valid pixels, after the outlier
    rule, 95 % confidence intervals, and each stratum."""
    entry: dict[str, Any] = {
        "stats": dh_summary.statistics(s),
        "resolution_m": dh_summary.statistic_bounds(s),
        "confidence_95": confidence_intervals(s),
        "without_outliers": without_outliers(s, rule=outlier_rule, factor=outlier_factor),
        "strata": [stratum_entry(key, part) for key, part in strata.items()],
    }
    if s.count == 0:
        entry["note"] = "no valid pixels: no overlap of test, reference and region"
    return entry


def region_entries(
    regions: Mapping[str, DhSummary],
    names: Mapping[str, str],
    strata: Mapping[str, Mapping[str, DhSummary]],
    *,
    outlier_rule: str,
    outlier_factor: float,
) -> list[dict[str, Any]]:
    """One entry per region, in the order given; an empty region says so."""
    return [
        {"region": region_id, "name": names.get(region_id, region_id)}
        | area_entry(
            s, strata.get(region_id, {}), outlier_rule=outlier_rule, outlier_factor=outlier_factor
        )
        for region_id, s in regions.items()
    ]


#: A median |dh| beyond this (metres) hints at a wrong vertical datum or unit, not at DEM error.
SUSPECT_MEDIAN_M = 10.0


def datum_cautions(stats: Mapping[str, Any]) -> list[str]:
    """A warning when the overall median dh is so large that datum or units are the likelier
    cause (a geoid undulation is tens of metres; feet vs metres scales heights by 3.28)."""
    median = stats.get("median")
    if median is None or abs(median) <= SUSPECT_MEDIAN_M:
        return []
    return [
        f"the median dh is {median:.2f} m: check the vertical datum (ellipsoidal vs geoid "
        "heights) and the units (metre, foot, US survey foot) of both sides before reading "
        "these figures as accuracy"
    ]


def vertical_accuracy_cautions(
    transformations: Sequence[Mapping[str, Any]], grading: Grading
) -> list[str]:
    """A caution for each vertical datum conversion (records of
    :func:`demaudit.workers.tile.datum.vertical_transformations`) whose accuracy as PROJ states it
    is worse
    than the finest RMSE class graded, or unknown."""
    finest = finest_graded_rmse(grading)
    cautions = []
    for t in transformations:
        what = (
            f"the {t['role']} heights' conversion {t['from']} -> {t['to']} "
            f"({'; '.join(t['operations'])})"
        )
        accuracy = t.get("accuracy_m")
        if accuracy is None:
            cautions.append(f"PROJ states no accuracy for {what}; its error is not bounded here")
        elif finest is not None and accuracy > finest[0]:
            cautions.append(
                f"PROJ states an accuracy of {accuracy:g} m for {what}, coarser than the finest "
                f"class graded ({finest[1]}: RMSE {finest[0]:g} m); the conversion alone may "
                "exceed that class unless both sides' heights were derived with the same model"
            )
    return cautions


def finest_graded_rmse(grading: Grading) -> tuple[float, str] | None:
    """The smallest RMSE (metres) a graded class requires, and its name: the ASPRS class, the
    quality level's RMSE_z and the user-defined RMSE, among the standards graded."""
    graded = set(grading.standards)
    classes = []
    if graded & {"asprs2014", "asprs2023"}:
        classes.append((grading.asprs_class_cm / 100, f"ASPRS {grading.asprs_class_cm:g} cm"))
    if "quality_level" in graded:
        rmse_cm = QUALITY_LEVELS_CM[grading.quality_level][0]
        classes.append((rmse_cm / 100, f"quality level {grading.quality_level}"))
    if "user" in graded and "required_rmse_m" in grading.user:
        classes.append((grading.user["required_rmse_m"], "user-defined RMSE"))
    return min(classes) if classes else None


def build_summary(
    *,
    job: Mapping[str, Any],
    overall: dict[str, Any],
    regions: list[dict[str, Any]],
    tiles: Sequence[Mapping[str, Any]],
    reference_failures: Sequence[Mapping[str, str]],
    extra_cautions: Sequence[str] = (),
    coregistration: Mapping[str, Any] | None = None,
) -> dict[str, Any]:
    """The summary.json document."""
    failed = [t for t in tiles if t["status"] == "failed"]
    cautions = list(CAUTIONS_ALWAYS) + list(extra_cautions)
    if failed:
        cautions.append(
            f"{len(failed)} test tile(s) failed and are not in the statistics; see tiles[].reason."
        )
    if reference_failures:
        cautions.append(
            f"{len(reference_failures)} reference tile(s) could not be read; test "
            "pixels they would cover have no reference."
        )
    cautions += datum_cautions(overall.get("stats") or {})
    return {
        "job": dict(job),
        "sign": SIGN,
        "units": "metre",
        "quantile_resolution_m": quantile_resolution(overall.get("resolution_m")),
        "overall": overall["stats"],
        "overall_detail": {k: v for k, v in overall.items() if k != "stats"},
        "regions": regions,
        "tiles": list(tiles),
        "reference_failures": list(reference_failures),
        "coregistration": dict(coregistration) if coregistration is not None else None,
        "cautions": cautions,
    }
