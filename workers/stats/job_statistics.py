"""A job's area statistics from its merged totals (pure): the whole job and each region, the
same after co-registration, and (when the spec asks) the error model with the areas'
uncertainties. Metres; dh = test - reference."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from demaudit.workers.outputs.summary_document import area_entry, region_entries
from demaudit.workers.stats.merge import JobAccumulator
from demaudit.workers.tile.strata import ClassInfo
from demaudit.workers.tile.task import ALL
from demaudit.workers.uncertainty.accumulate import ErrorModelAccumulator
from demaudit.workers.uncertainty.error_model import attach_error_model


@dataclass(frozen=True)
class Totals:
    """The job's merged tile summaries: of dh, of dh after co-registration (empty without
    it), and the error-model samples of each."""

    all: JobAccumulator
    after: JobAccumulator
    errors: ErrorModelAccumulator
    errors_after: ErrorModelAccumulator


@dataclass(frozen=True)
class AreaRules:
    """How areas are described: region ids (in order) and names, the outlier rule."""

    region_ids: Sequence[str]
    names: Mapping[str, str]
    outlier_rule: str
    outlier_factor: float


@dataclass(frozen=True)
class ErrorModelLayout:
    """The error model's settings (spec ``error_model`` and the strata), or none."""

    max_distance_m: float
    seed: int
    with_landcover: bool
    classes: Sequence[ClassInfo]
    slope_edges: Sequence[float]


@dataclass(frozen=True)
class AreaStatistics:
    """summary.json's areas: the overall entry, the region entries, the co-registration section
    (with its ``after`` statistics) and the error model section (None without them)."""

    overall: dict[str, Any]
    regions: list[dict[str, Any]]
    coregistration: dict[str, Any] | None = None
    error_model: dict[str, Any] | None = None


def _areas(acc: JobAccumulator, rules: AreaRules) -> tuple[dict[str, Any], list[dict[str, Any]]]:
    rule: dict[str, Any] = {
        "outlier_rule": rules.outlier_rule,
        "outlier_factor": rules.outlier_factor,
    }
    regions = region_entries(
        {r: acc.regions[r] for r in rules.region_ids}, rules.names, acc.strata, **rule
    )
    return area_entry(acc.overall, acc.strata_of(ALL), **rule), regions


def area_statistics(
    totals: Totals, rules: AreaRules, *, coregistration: Mapping[str, Any] | None
) -> AreaStatistics:
    """The areas' statistics; coregistration: the estimate's report, which gets the areas
    after the correction as ``after`` when any tile was corrected."""
    overall, regions = _areas(totals.all, rules)
    if coregistration is None:
        return AreaStatistics(overall, regions)
    section = dict(coregistration)
    if not totals.after.is_empty:
        after_overall, after_regions = _areas(totals.after, rules)
        section["after"] = {"overall": after_overall, "regions": after_regions}
    return AreaStatistics(overall, regions, section)


def with_error_model(
    areas: AreaStatistics, totals: Totals, layout: ErrorModelLayout
) -> AreaStatistics:
    """The areas with the error model fitted to the samples (workers/uncertainty/error_model.py)
    and their uncertainties; the same after co-registration when there is an ``after``."""
    settings: dict[str, Any] = dict(layout.__dict__)
    section = areas.coregistration
    after = (section or {}).get("after")
    if section is not None and after is not None and totals.errors_after.tiles:
        model, overall, regions = attach_error_model(
            totals.errors_after, overall=after["overall"], regions=after["regions"], **settings
        )
        after = {"overall": overall, "regions": regions, "error_model": model}
        section = section | {"after": after}
    model, overall, regions = attach_error_model(
        totals.errors, overall=areas.overall, regions=areas.regions, **settings
    )
    return AreaStatistics(overall, regions, section, model)
