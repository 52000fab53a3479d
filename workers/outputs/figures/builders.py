"""The figure builders: each takes a :class:`FigureContext`, picks what it needs from the job's
document and summaries, has :mod:`compute`/:mod:`geometry` work out what to draw, draws it
with :mod:`draw`/:mod:`charts`, and returns ``(Figure, metadata)``, or None when the results
do not allow the figure (the metadata goes into summary.json ``figures``)."""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from typing import Any

import numpy as np
from matplotlib.figure import Figure
from numpy.typing import NDArray
from shapely.geometry import box

from demaudit.workers.outputs.figures import charts, compute, draw
from demaudit.workers.outputs.figures.context import FigureContext
from demaudit.workers.outputs.figures.geometry import outline_lonlat, scale_bar

WORST_TILES = 5
Drawn = tuple[Figure, dict[str, Any]]
Builder = Callable[[FigureContext], Drawn | None]


def _tiles_with(
    document: Mapping[str, Any], keep: Callable[[str], bool]
) -> list[tuple[str, compute.Bounds]]:
    return [
        (t["tile"], tuple(t["bounds"]))  # type: ignore[misc]
        for t in document.get("tiles", [])
        if keep(str(t.get("status"))) and t.get("bounds")
    ]


def _extent(bounds: Sequence[compute.Bounds] | NDArray[np.float64]) -> compute.Bounds:
    b = np.asarray(bounds, dtype=float).reshape(-1, 4)
    return float(b[:, 0].min()), float(b[:, 1].min()), float(b[:, 2].max()), float(b[:, 3].max())


def _map_layers(ctx: FigureContext, extent: compute.Bounds) -> draw.MapLayers:
    frame = box(*extent)
    frame_info = ctx.frame(extent)
    return draw.MapLayers(
        frame=frame_info,
        regions=[r for r in ctx.regions if r[2].intersects(frame)],
        failed=_tiles_with(ctx.document, lambda status: status == "failed"),
        # no reference, no valid pixel, checkpoints only: left out of the statistics, not failed
        not_audited=_tiles_with(ctx.document, lambda status: status not in ("ok", "failed")),
        scale_bar=scale_bar(frame_info, extent),
        lonlat=outline_lonlat(extent, ctx.crs) if ctx.crs else None,
    )


def build_dh_map(ctx: FigureContext) -> Drawn | None:
    overall = ctx.document.get("overall") or {}
    if ctx.overview is None or not overall.get("count"):
        return None
    values, extent = ctx.overview
    limits = compute.robust_limits(float(overall["median"]), float(overall["nmad"]))
    layers = _map_layers(ctx, extent)
    title = f"{ctx.title}: dh (block means of the overview)"
    fig = draw.dh_map(values, extent, limits, layers, title=title)
    bar = layers.scale_bar
    meta: dict[str, Any] = {
        "shows": "dh map (block means of the 1:n overview) with region outlines; voids grey, "
        "failed and not-audited tiles hatched; scale bar; inset locating the job in lon/lat",
        "colour_limits_m": [limits.low, limits.high],
        "limit_rule": limits.rule,
        "regions_outlined": [r[0] for r in layers.regions],
        "failed_tiles": [t for t, _ in layers.failed],
        "not_audited_tiles": [t for t, _ in layers.not_audited],
        "void_fraction": float(np.mean(~np.isfinite(values))),
        "scale_bar_m": bar.length_m if bar else None,
        "scale_bar_label": bar.label if bar else None,
        "inset": "outline of the job's extent in longitude/latitude" if layers.lonlat else None,
    }
    if ctx.overall is not None:
        below, above = compute.clipped_share(ctx.overall, limits)
        meta["pixels_beyond_limits_fraction"] = {"below": below, "above": above}
    return fig, meta


def tile_map_builder(statistic: str) -> Builder:
    """The builder of the tile map by statistic; it draws only when the spec asks for it
    (figures.tile_statistics)."""

    def build(ctx: FigureContext) -> Drawn | None:
        if statistic not in ctx.tile_statistics:
            return None
        values = compute.tile_values(ctx.document.get("tiles", []), statistic)
        if not any(v.value is not None for v in values):
            return None
        worst = compute.worst_tiles(values, statistic, n=WORST_TILES)
        value_range = compute.value_limits(values, statistic)
        what = "indicative ASPRS class" if statistic == "grade" else statistic
        frame = ctx.frame(_extent([v.bounds for v in values]))
        title = f"{ctx.title}: tiles by {what}"
        fig = draw.tile_map(values, statistic, value_range, worst, title=title, frame=frame)
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
    fig = charts.histogram(h, log_counts=ctx.log_counts, title=f"{ctx.title}: distribution of dh")
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


STRATA_PANELS = (("slope band (degrees)", "slope_deg:"), ("land cover", "landcover:"))
NMAD_INTERVAL_RULE = compute.NMAD_INTERVAL_NOTE


def _row_entry(r: compute.StratumRow) -> dict[str, Any]:
    return {
        "stratum": r.label,
        "count": r.count,
        "median": r.median,
        "nmad": r.nmad,
        "median_ci_95": list(r.median_ci) if r.median_ci else None,
        "nmad_ci_95": list(r.nmad_ci) if r.nmad_ci else None,
    }


def build_strata(ctx: FigureContext) -> Drawn | None:
    entries = (ctx.document.get("overall_detail") or {}).get("strata") or []
    panels = [
        (name, compute.strata_rows(entries, prefix, ctx.strata)) for name, prefix in STRATA_PANELS
    ]
    panels = [(name, rows) for name, rows in panels if rows]
    if not panels:
        return None
    title = f"{ctx.title}: median and NMAD of dh by stratum"
    fig = charts.strata_panels(panels, title=title)
    return fig, {
        "shows": "median (95 % interval, order statistics) and NMAD (95 % interval) by slope "
        "band and land cover",
        "nmad_interval_rule": NMAD_INTERVAL_RULE,
        "panels": {name: [_row_entry(r) for r in rows] for name, rows in panels},
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
    shift = np.array([[t["coregistration"][k] for k in ("east_m", "north_m")] for t in tiles])
    fig = draw.tile_shifts(
        (b[:, 0] + b[:, 2]) / 2,
        (b[:, 1] + b[:, 3]) / 2,
        shift[:, 0],
        shift[:, 1],
        [t["tile"] in outliers for t in tiles],
        title="per-tile horizontal shift of the test model (red: outlier tiles)",
        frame=ctx.frame(_extent(b)),
    )
    return fig, {"shows": "per-tile horizontal shift vectors", "outlier_tiles": sorted(outliers)}


def build_recheck_map(ctx: FigureContext) -> Drawn | None:
    recheck = ctx.document.get("recheck")
    if not recheck:
        return None
    tiles = compute.recheck_tiles(recheck, ctx.document.get("tiles", []))
    if not tiles:
        return None
    title = f"{ctx.title}: tiles recomputed and their verdicts"
    fig = draw.verdict_map(tiles, title=title, frame=ctx.frame(_extent([t[1] for t in tiles])))
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
    title = f"{ctx.title}: regions before and after the re-check"
    fig = charts.before_after(changes, title=title)
    return fig, {
        "shows": "median and NMAD per region before (open) and after (filled, by verdict)",
        "regions": changes,
    }
