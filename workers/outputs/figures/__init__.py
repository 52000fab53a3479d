"""Figures of a job for people (PNG, matplotlib Agg), and what each shows (summary.json
``figures``: file name -> metadata, e.g. the colour limits used).

Three layers: :mod:`demaudit.workers.outputs.figures.compute` works out what to draw (pure, no
matplotlib),
:mod:`demaudit.workers.outputs.figures.draw` draws it, and this module reads the job's outputs,
runs the
builders of :data:`BUILDERS` and writes the files. A builder takes a :class:`FigureContext`
and returns ``(Figure, metadata)`` or None when the results do not allow it; to add a figure
(e.g. a variogram), write a builder and append ``(file name, builder)`` to ``BUILDERS``.

Reads only what the job wrote (results.zarr and the summary document) plus what the caller
passes (the merged summary, the strata summaries, the regions in the overview's CRS), so it
runs at the end of a job or later on a results folder.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import Any

import numpy as np
import zarr
from matplotlib.figure import Figure
from numpy.typing import NDArray
from shapely.geometry import box
from shapely.geometry.base import BaseGeometry

from demaudit.workers.outputs.figures import compute, draw
from demaudit.workers.outputs.figures.error_model import ERROR_MODEL_NAME, build_error_model
from demaudit.workers.outputs.layout import OVERVIEW_GROUP, ZARR_NAME
from demaudit.workers.outputs.summary_store import ALL_PART, read_job_totals
from demaudit.workers.stats import summary as dhs
from demaudit.workers.stats.merge import ALL
from demaudit.workers.tile.difference import block_mean

MAP_NAME = "dh_map.png"
HISTOGRAM_NAME = "dh_histogram.png"
STRATA_NAME = "dh_by_stratum.png"
SHIFTS_NAME = "tile_shifts.png"
RECHECK_MAP_NAME = "recheck_tiles.png"
RECHECK_REGIONS_NAME = "recheck_regions.png"
MAP_PIXELS = 700
DPI = 100
WORST_TILES = 5

Drawn = tuple[Figure, dict[str, Any]]


@dataclass
class FigureContext:
    """What the builders draw from. ``regions``: (id, name, polygon in ``crs``)."""

    out_dir: Path
    document: Mapping[str, Any]
    overall: dhs.DhSummary | None = None
    strata: Mapping[str, dhs.DhSummary] = field(default_factory=dict)
    regions: Sequence[tuple[str, str, BaseGeometry]] = ()
    crs: str | None = None
    log_counts: bool = True

    @cached_property
    def overview(self) -> tuple[NDArray[np.float64], compute.Bounds] | None:
        """The dh overview (block means down to at most MAP_PIXELS a side) and its extent."""
        return read_overview(self.out_dir)

    @property
    def title(self) -> str:
        return str(self.document["job"]["name"])


def read_overview(out_dir: Path) -> tuple[NDArray[np.float64], compute.Bounds] | None:
    try:
        # read with zarr into this process: through xarray and Dask, the blocks would be
        # computed on whatever cluster the caller has open and shipped back
        group: Any = zarr.open_group(str(Path(out_dir) / ZARR_NAME / OVERVIEW_GROUP), mode="r")
        dh, x, y = group["dh"][...], group["x"][...], group["y"][...]
    except (KeyError, FileNotFoundError, OSError):
        return None
    if dh.size == 0:
        return None
    dx = abs(float(x[1] - x[0])) if x.size > 1 else 1.0
    dy = abs(float(y[1] - y[0])) if y.size > 1 else dx
    extent = (
        float(x.min()) - dx / 2,
        float(y.min()) - dy / 2,
        float(x.max()) + dx / 2,
        float(y.max()) + dy / 2,
    )
    factor = max(-(-max(dh.shape) // MAP_PIXELS), 1)  # no more map pixels than the figure shows
    values = block_mean(np.asarray(dh, dtype=np.float64), factor) if factor > 1 else dh
    return np.asarray(values, dtype=np.float64), extent


def stored_totals(
    out_dir: Path, document: Mapping[str, Any]
) -> tuple[dhs.DhSummary | None, dict[str, dhs.DhSummary]]:
    """The merged summary and strata of the whole job from results.zarr (None, {} without)."""
    region_ids = [r["region"] for r in document.get("regions", [])]
    try:
        acc = read_job_totals(Path(out_dir) / ZARR_NAME, ALL_PART, region_ids)
    except (KeyError, ValueError, OSError):
        return None, {}
    if acc is None:
        return None, {}
    return acc.overall, acc.strata_of(ALL)


def overview_crs(out_dir: Path) -> str | None:
    try:
        group: Any = zarr.open_group(str(Path(out_dir) / ZARR_NAME / OVERVIEW_GROUP), mode="r")
        return str(group["spatial_ref"].attrs["crs_wkt"])
    except (KeyError, FileNotFoundError, OSError):
        return None


def _tiles_with(
    document: Mapping[str, Any], keep: Callable[[str], bool]
) -> list[tuple[str, compute.Bounds]]:
    return [
        (t["tile"], tuple(t["bounds"]))  # type: ignore[misc]
        for t in document.get("tiles", [])
        if keep(str(t.get("status"))) and t.get("bounds")
    ]


def build_dh_map(ctx: FigureContext) -> Drawn | None:
    overall = ctx.document.get("overall") or {}
    if ctx.overview is None or not overall.get("count"):
        return None
    values, extent = ctx.overview
    limits = compute.robust_limits(float(overall["median"]), float(overall["nmad"]))
    frame = box(*extent)
    regions = [r for r in ctx.regions if r[2].intersects(frame)]
    metre = ctx.crs is not None and compute.metre_units(ctx.crs)
    scale = compute.nice_length(extent[2] - extent[0]) if metre else None
    lonlat = compute.outline_lonlat(extent, ctx.crs) if ctx.crs else None
    failed = _tiles_with(ctx.document, lambda status: status == "failed")
    # no reference, no valid pixel, checkpoints only: left out of the statistics, not failed
    not_audited = _tiles_with(ctx.document, lambda status: status not in ("ok", "failed"))
    fig = draw.dh_map(
        values,
        extent,
        limits,
        title=f"{ctx.title}: dh (block means of the overview)",
        regions=regions,
        failed=failed,
        not_audited=not_audited,
        scale_bar_m=scale,
        lonlat=lonlat,
    )
    meta: dict[str, Any] = {
        "shows": "dh map (block means of the 1:n overview) with region outlines; voids grey, "
        "failed and not-audited tiles hatched; scale bar; inset locating the job in lon/lat",
        "colour_limits_m": [limits.low, limits.high],
        "limit_rule": limits.rule,
        "regions_outlined": [r[0] for r in regions],
        "failed_tiles": [t for t, _ in failed],
        "not_audited_tiles": [t for t, _ in not_audited],
        "void_fraction": float(np.mean(~np.isfinite(values))),
        "scale_bar_m": scale,
        "inset": "outline of the job's extent in longitude/latitude" if lonlat else None,
    }
    if ctx.overall is not None:
        below, above = compute.clipped_share(ctx.overall, limits)
        meta["pixels_beyond_limits_fraction"] = {"below": below, "above": above}
    return fig, meta


def tile_map_builder(statistic: str) -> Callable[[FigureContext], Drawn | None]:
    def build(ctx: FigureContext) -> Drawn | None:
        values = compute.tile_values(ctx.document.get("tiles", []), statistic)
        if not any(v.value is not None for v in values):
            return None
        worst = compute.worst_tiles(values, statistic, n=WORST_TILES)
        value_range = compute.value_limits(values, statistic)
        what = "indicative ASPRS class" if statistic == "grade" else statistic
        fig = draw.tile_map(
            values, statistic, value_range, worst, title=f"{ctx.title}: tiles by {what}"
        )
        return fig, {
            "shows": f"tiles coloured by {what}; the {len(worst)} worst labelled",
            "statistic": statistic,
            "colour_limits": list(value_range),
            "worst_tiles": worst,
            "tiles_drawn": len(values),
        }

    return build


def build_histogram(ctx: FigureContext) -> Drawn | None:
    if ctx.overall is None or ctx.overall.count == 0:
        return None
    h = compute.display_histogram(ctx.overall)
    fig = draw.histogram(h, log_counts=ctx.log_counts, title=f"{ctx.title}: distribution of dh")
    return fig, {
        "shows": "dh histogram from the merged summary's bins (all valid pixels), with the "
        "Gaussian of mean/std and the Gaussian of median/NMAD",
        "window_m": [float(h.edges[0]), float(h.edges[-1])],
        "bars": len(h.counts),
        "log_counts": ctx.log_counts,
        "gaussian_moments": {"mean_m": h.mean, "std_m": h.std},
        "gaussian_robust": {"median_m": h.median, "nmad_m": h.nmad},
        "beyond_window": {"below": h.below, "above": h.above},
    }


def build_strata(ctx: FigureContext) -> Drawn | None:
    entries = (ctx.document.get("overall_detail") or {}).get("strata") or []
    panels = [
        (name, compute.strata_rows(entries, prefix, ctx.strata))
        for name, prefix in (("slope band (degrees)", "slope_deg:"), ("land cover", "landcover:"))
    ]
    panels = [(name, rows) for name, rows in panels if rows]
    if not panels:
        return None
    fig = draw.strata_panels(panels, title=f"{ctx.title}: median and NMAD of dh by stratum")
    return fig, {
        "shows": "median (95 % interval, order statistics) and NMAD by slope band and land cover",
        "panels": {
            name: [
                {
                    "stratum": r.label,
                    "median": r.median,
                    "nmad": r.nmad,
                    "median_ci_95": list(r.median_ci) if r.median_ci else None,
                }
                for r in rows
            ]
            for name, rows in panels
        },
    }


def build_tile_shifts(ctx: FigureContext) -> Drawn | None:
    tiles = [
        t
        for t in ctx.document.get("tiles", [])
        if (t.get("coregistration") or {}).get("status") == "ok" and t.get("bounds")
    ]
    if not tiles:
        return None
    outliers = set((ctx.document.get("coregistration") or {}).get("outlier_tiles") or {})
    b = np.array([t["bounds"] for t in tiles], dtype=float)
    fig = draw.tile_shifts(
        (b[:, 0] + b[:, 2]) / 2,
        (b[:, 1] + b[:, 3]) / 2,
        np.array([t["coregistration"]["east_m"] for t in tiles], dtype=float),
        np.array([t["coregistration"]["north_m"] for t in tiles], dtype=float),
        [t["tile"] in outliers for t in tiles],
        title="per-tile horizontal shift of the test model (red: outlier tiles)",
    )
    return fig, {"shows": "per-tile horizontal shift vectors", "outlier_tiles": sorted(outliers)}


def build_recheck_map(ctx: FigureContext) -> Drawn | None:
    recheck = ctx.document.get("recheck")
    if not recheck:
        return None
    tiles = compute.recheck_tiles(recheck, ctx.document.get("tiles", []))
    if not tiles:
        return None
    fig = draw.verdict_map(tiles, title=f"{ctx.title}: tiles recomputed and their verdicts")
    counts = {v: sum(t[2] == v for t in tiles) for v in compute.VERDICT_ORDER}
    return fig, {
        "shows": "tiles recomputed in this re-check coloured by verdict; the rest reused",
        "verdicts": {k: n for k, n in counts.items() if n},
        "tiles_removed": list(recheck.get("tiles_removed", [])),
    }


def build_recheck_regions(ctx: FigureContext) -> Drawn | None:
    changes = compute.region_changes(ctx.document.get("recheck") or {})
    if not changes:
        return None
    fig = draw.before_after(changes, title=f"{ctx.title}: regions before and after the re-check")
    return fig, {
        "shows": "median and NMAD per region before (open) and after (filled, by verdict)",
        "regions": changes,
    }


#: (file name, builder) in the order they appear in report.html
BUILDERS: list[tuple[str, Callable[[FigureContext], Drawn | None]]] = [
    (MAP_NAME, build_dh_map),
    (HISTOGRAM_NAME, build_histogram),
    ("tile_median.png", tile_map_builder("median")),
    ("tile_nmad.png", tile_map_builder("nmad")),
    ("tile_grade.png", tile_map_builder("grade")),
    (STRATA_NAME, build_strata),
    (RECHECK_MAP_NAME, build_recheck_map),
    (RECHECK_REGIONS_NAME, build_recheck_regions),
    (SHIFTS_NAME, build_tile_shifts),
    (ERROR_MODEL_NAME, build_error_model),
]


def write_figures(
    out_dir: Path,
    document: Mapping[str, Any],
    *,
    overall: dhs.DhSummary | None = None,
    strata: Mapping[str, dhs.DhSummary] | None = None,
    regions: Sequence[tuple[str, str, BaseGeometry]] = (),
    crs: str | None = None,
    log_counts: bool = True,
) -> dict[str, dict[str, Any]]:
    """Write the figures the results allow into out_dir; return file name -> what it shows.

    Without ``overall`` (the merged summary of all valid pixels) and ``strata``, they are read
    from the job totals in results.zarr when it has them."""
    if overall is None:
        overall, strata = stored_totals(Path(out_dir), document)
    ctx = FigureContext(
        Path(out_dir),
        document,
        overall,
        strata or {},
        regions,
        crs or overview_crs(Path(out_dir)),
        log_counts,
    )
    written: dict[str, dict[str, Any]] = {}
    for name, build in BUILDERS:
        drawn = build(ctx)
        if drawn is None:
            continue
        fig, meta = drawn
        fig.savefig(ctx.out_dir / name, dpi=DPI)
        written[name] = meta
    return written
