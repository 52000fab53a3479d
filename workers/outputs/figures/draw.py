"""Drawing of the figures (matplotlib, Agg, no pyplot state): each function takes what
:mod:`demaudit.workers.outputs.figures.compute` worked out and returns a Figure; nothing here
computes a
statistic.

Artists the tests look for carry a ``gid``: ``region:<id>`` for each region outline,
``tile:<id>`` for tile rectangles, ``gauss:moments`` / ``gauss:robust`` for the two curves,
``scale-bar``, ``inset``, ``failed:<id>`` / ``not-audited:<id>`` for tiles without results.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import matplotlib

matplotlib.use("Agg")
import numpy as np  # noqa: E402
from matplotlib.axes import Axes  # noqa: E402
from matplotlib.collections import PatchCollection  # noqa: E402
from matplotlib.colors import BoundaryNorm, Colormap, ListedColormap, Normalize  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402
from matplotlib.patches import Patch, PathPatch, Rectangle  # noqa: E402
from matplotlib.path import Path as MplPath  # noqa: E402
from numpy.typing import NDArray  # noqa: E402
from shapely.geometry.base import BaseGeometry  # noqa: E402

from demaudit.workers.checkpoints.grading import ASPRS_CLASSES_CM  # noqa: E402
from demaudit.workers.outputs.figures import compute  # noqa: E402

# our palette: a blue-to-ochre diverging scale for dh, grey voids, hatched failures
DH_CMAP = "PuOr_r"
SPREAD_CMAP = "YlOrBr"
VOID_COLOUR = "#c8c8c8"
UNDER_COLOUR = "#241a4d"
OVER_COLOUR = "#4d2600"
VERDICT_COLOURS = {
    "regressed": "#c2185b",
    "improved": "#2e7d32",
    "unchanged": "#90a4ae",
    "new": "#1565c0",
    "removed": "#5d4037",
    "reused": "#eceff1",
}
Bounds = compute.Bounds


def new_figure(width: float, height: float) -> Figure:
    """A figure without a layout engine: the axes are placed by hand (a layout engine doubles
    the drawing time)."""
    return Figure(figsize=(width, height))


MAP_AXES = (0.12, 0.08, 0.64, 0.85)
BAR_AXES = (0.80, 0.14, 0.025, 0.72)


def _projected_axes(ax: Axes) -> None:
    ax.set_aspect("equal")
    ax.set_xlabel("easting (m)")
    ax.set_ylabel("northing (m)")
    ax.ticklabel_format(useOffset=False, style="plain")
    ax.tick_params(labelsize=7)


def geometry_path(geometry: BaseGeometry) -> MplPath:
    """One compound path of a (multi)polygon's exterior and interior rings."""
    polygons = getattr(geometry, "geoms", [geometry])
    vertices: list[NDArray[np.float64]] = []
    codes: list[NDArray[np.uint8]] = []
    for polygon in polygons:
        for ring in [polygon.exterior, *polygon.interiors]:
            xy = np.asarray(ring.coords, dtype=float)[:, :2]
            c = np.full(len(xy), MplPath.LINETO, dtype=np.uint8)
            c[0], c[-1] = MplPath.MOVETO, MplPath.CLOSEPOLY
            vertices.append(xy)
            codes.append(c)
    return MplPath(np.concatenate(vertices), np.concatenate(codes))


def draw_regions(ax: Axes, regions: Sequence[tuple[str, str, BaseGeometry]]) -> int:
    """Each region's outline (one patch each) and its id at a point inside it."""
    for region_id, _name, geometry in regions:
        patch = PathPatch(
            geometry_path(geometry), fill=False, edgecolor="black", linewidth=1.1, zorder=4
        )
        patch.set_gid(f"region:{region_id}")
        ax.add_patch(patch)
        point = geometry.representative_point()
        ax.annotate(
            region_id,
            (point.x, point.y),
            ha="center",
            va="center",
            fontsize=8,
            zorder=5,
            fontweight="bold",
            bbox={"boxstyle": "round,pad=0.15", "fc": "white", "alpha": 0.7},
        )
    return len(regions)


def draw_missing_tiles(
    ax: Axes, failed: Sequence[tuple[str, Bounds]], not_audited: Sequence[tuple[str, Bounds]]
) -> None:
    for kind, tiles, hatch in (("failed", failed, "xxx"), ("not-audited", not_audited, "///")):
        for tile_id, (left, bottom, right, top) in tiles:
            rect = Rectangle(
                (left, bottom),
                right - left,
                top - bottom,
                facecolor="white",
                edgecolor="#333333",
                hatch=hatch,
                linewidth=0.6,
                zorder=3,
            )
            rect.set_gid(f"{kind}:{tile_id}")
            ax.add_patch(rect)


def draw_scale_bar(ax: Axes, extent: Bounds, length_m: float) -> None:
    left, bottom, right, top = extent
    x0 = left + 0.04 * (right - left)
    y0 = bottom + 0.04 * (top - bottom)
    h = 0.012 * (top - bottom)
    for i in range(2):  # two halves, dark and light
        part = Rectangle(
            (x0 + i * length_m / 2, y0),
            length_m / 2,
            h,
            facecolor="black" if i == 0 else "white",
            edgecolor="black",
            linewidth=0.8,
            zorder=6,
        )
        part.set_gid("scale-bar" if i == 0 else "scale-bar-half")
        ax.add_patch(part)
    label = f"{length_m / 1000:g} km" if length_m >= 1000 else f"{length_m:g} m"
    ax.text(x0 + length_m / 2, y0 + 1.6 * h, label, ha="center", va="bottom", fontsize=8, zorder=6)


def draw_inset(ax: Axes, lon: NDArray[np.float64], lat: NDArray[np.float64]) -> Axes:
    """A small lon/lat frame (a few degrees around the job) with the job's outline filled."""
    inset = ax.inset_axes((0.72, 0.72, 0.26, 0.26))
    inset.set_gid("inset")
    clon, clat = float(np.mean(lon)), float(np.mean(lat))
    half = max(3.0, float(np.ptp(lon)), float(np.ptp(lat)))
    inset.fill(lon, lat, facecolor="#d84315", edgecolor="#d84315", linewidth=1.5)
    inset.plot([clon], [clat], marker="s", markersize=4, markerfacecolor="none", color="#d84315")
    inset.set_xlim(clon - half, clon + half)
    inset.set_ylim(max(clat - half, -90), min(clat + half, 90))
    inset.grid(True, linewidth=0.4, color="#999999")
    inset.tick_params(labelsize=5, length=2)
    inset.set_facecolor("#f7f4ec")
    inset.set_title(f"lon {clon:.2f}°, lat {clat:.2f}°", fontsize=6)
    return inset


def dh_map(
    values: NDArray[np.float64],
    extent: Bounds,
    limits: compute.Limits,
    *,
    title: str,
    regions: Sequence[tuple[str, str, BaseGeometry]],
    failed: Sequence[tuple[str, Bounds]],
    not_audited: Sequence[tuple[str, Bounds]],
    scale_bar_m: float | None,
    lonlat: tuple[NDArray[np.float64], NDArray[np.float64]] | None,
) -> Figure:
    fig = new_figure(7.5, 6.6)
    ax = fig.add_axes(MAP_AXES)
    cmap = matplotlib.colormaps[DH_CMAP].with_extremes(
        bad=VOID_COLOUR, under=UNDER_COLOUR, over=OVER_COLOUR
    )
    left, bottom, right, top = extent
    image = ax.imshow(
        values,
        cmap=cmap,
        norm=Normalize(limits.low, limits.high),
        extent=(left, right, bottom, top),
        interpolation="nearest",
        zorder=1,
    )
    draw_missing_tiles(ax, failed, not_audited)
    draw_regions(ax, regions)
    if scale_bar_m:
        draw_scale_bar(ax, extent, scale_bar_m)
    if lonlat is not None:
        draw_inset(ax, *lonlat)
    bar = fig.colorbar(image, cax=fig.add_axes(BAR_AXES), extend="both")
    bar.set_label(
        f"dh = test - reference (m); colours clipped at {limits.low:.3f} and {limits.high:.3f} m\n"
        f"({limits.rule}); darker ends: beyond",
        fontsize=7,
    )
    handles = [Patch(facecolor=VOID_COLOUR, label="void: no valid dh")]
    if failed:
        handles.append(
            Patch(facecolor="white", edgecolor="#333333", hatch="xxx", label="failed tile")
        )
    if not_audited:
        handles.append(
            Patch(facecolor="white", edgecolor="#333333", hatch="///", label="tile not audited")
        )
    if regions:
        handles.append(Patch(facecolor="none", edgecolor="black", label="region outline"))
    ax.legend(handles=handles, loc="upper left", fontsize=7, framealpha=0.85)
    ax.set_title(title, fontsize=10)
    ax.set_xlim(left, right)
    ax.set_ylim(bottom, top)
    _projected_axes(ax)
    return fig


def tile_map(
    values: Sequence[compute.TileValue],
    statistic: str,
    value_range: tuple[float, float],
    worst: Sequence[str],
    *,
    title: str,
) -> Figure:
    fig = new_figure(7.0, 6.2)
    ax = fig.add_axes(MAP_AXES)
    known = [v for v in values if v.value is not None]
    cmap: Colormap
    if statistic == "grade":
        labels = [f"{cm:g} cm" for cm in ASPRS_CLASSES_CM] + [f">{ASPRS_CLASSES_CM[-1]:g} cm"]
        cmap = ListedColormap(matplotlib.colormaps["viridis"](np.linspace(0, 1, len(labels))))
        norm: Normalize = BoundaryNorm(np.arange(len(labels) + 1) - 0.5, cmap.N)
    else:
        cmap = matplotlib.colormaps[DH_CMAP if statistic == "median" else SPREAD_CMAP]
        norm = Normalize(*value_range)
    patches = [_tile_rect(v.bounds) for v in known]
    collection = PatchCollection(patches, cmap=cmap, norm=norm, edgecolor="white", linewidth=0.4)
    collection.set_array(np.array([v.value for v in known], dtype=float))
    collection.set_gid("tiles")
    ax.add_collection(collection)
    for v in values:
        if v.value is None:
            rect = _tile_rect(v.bounds)
            rect.set(facecolor="white", edgecolor="#333333", hatch="xxx", linewidth=0.5)
            rect.set_gid(f"no-value:{v.tile}")
            ax.add_patch(rect)
    by_id = {v.tile: v for v in values}
    for rank, tile_id in enumerate(worst, 1):
        left, bottom, right, top = by_id[tile_id].bounds
        ax.annotate(
            str(rank),
            ((left + right) / 2, (bottom + top) / 2),
            ha="center",
            va="center",
            fontsize=7,
            fontweight="bold",
            zorder=5,
            gid=f"worst:{tile_id}",
            bbox={"boxstyle": "circle,pad=0.2", "fc": "white", "ec": "#c2185b", "alpha": 0.9},
        )
    if worst:  # the ranks on the map, the ids below it
        fig.text(
            MAP_AXES[0],
            0.012,
            "worst: " + ", ".join(f"{rank} {t}" for rank, t in enumerate(worst, 1)),
            fontsize=7,
        )
    if len(known) < len(values):
        hatch = Patch(facecolor="white", edgecolor="#333333", hatch="xxx")
        ax.legend([hatch], ["no statistics (failed or not audited)"], loc="lower left", fontsize=7)
    bar = fig.colorbar(collection, cax=fig.add_axes(BAR_AXES))
    if statistic == "grade":
        bar.set_ticks(list(range(len(labels))), labels=labels)
        bar.set_label("finest ASPRS class met by the tile's RMSE (indicative)", fontsize=7)
    else:
        bar.set_label(f"{statistic} of the tile's dh (m)", fontsize=7)
    every = [v.bounds for v in values]
    ax.set_xlim(min(b[0] for b in every), max(b[2] for b in every))
    ax.set_ylim(min(b[1] for b in every), max(b[3] for b in every))
    ax.set_title(title, fontsize=10)
    _projected_axes(ax)
    return fig


def _tile_rect(bounds: Bounds) -> Rectangle:
    left, bottom, right, top = bounds
    return Rectangle((left, bottom), right - left, top - bottom)


def histogram(h: compute.Histogram, *, log_counts: bool, title: str) -> Figure:
    fig = new_figure(7.5, 4.6)
    fig.subplots_adjust(left=0.1, right=0.97, bottom=0.12, top=0.92)
    ax = fig.add_subplot()
    ax.stairs(h.counts, h.edges, fill=True, color="#b0bec5", label="pixels (merged histogram)")
    ax.plot(
        h.x,
        h.gauss_moments,
        color="#6a1b9a",
        linewidth=1.4,
        gid="gauss:moments",
        label=f"Gaussian, mean {h.mean:.3f} m, std {h.std:.3f} m",
    )
    ax.plot(
        h.x,
        h.gauss_robust,
        color="#e65100",
        linewidth=1.4,
        linestyle="--",
        gid="gauss:robust",
        label=f"Gaussian, median {h.median:.3f} m, NMAD {h.nmad:.3f} m",
    )
    if log_counts:
        ax.set_yscale("log")
        positive = h.counts[h.counts > 0]
        if positive.size:
            ax.set_ylim(max(0.5, float(positive.min()) / 2), float(positive.max()) * 3)
    ax.set_xlabel("dh = test - reference (m)")
    ax.set_ylabel("pixels per bar" + (" (log scale)" if log_counts else ""))
    ax.legend(fontsize=7, loc="upper right")
    ax.set_title(title, fontsize=10)
    ax.text(
        0.01,
        0.98,
        f"beyond the window: {h.below:,} below, {h.above:,} above",
        transform=ax.transAxes,
        fontsize=7,
        va="top",
    )
    return fig


def strata_panels(
    panels: Sequence[tuple[str, Sequence[compute.StratumRow]]], *, title: str
) -> Figure:
    height = 1.4 + sum(0.3 * len(rows) + 0.8 for _, rows in panels)
    fig = new_figure(8.0, height)
    grid = fig.add_gridspec(
        len(panels),
        2,
        height_ratios=[max(len(r), 1) + 1 for _, r in panels],
        left=0.22,
        right=0.97,
        bottom=0.9 / height,
        top=1 - 0.7 / height,
        hspace=0.6,
        wspace=0.08,
    )
    for i, (name, rows) in enumerate(panels):
        y = np.arange(len(rows))
        ax_m, ax_n = fig.add_subplot(grid[i, 0]), fig.add_subplot(grid[i, 1])
        medians = np.array([r.median for r in rows])
        low = np.array(
            [
                r.median - r.median_ci[0] if r.median_ci and r.median_ci[0] is not None else 0.0
                for r in rows
            ]
        )
        high = np.array(
            [
                r.median_ci[1] - r.median if r.median_ci and r.median_ci[1] is not None else 0.0
                for r in rows
            ]
        )
        ax_m.errorbar(
            medians,
            y,
            xerr=np.vstack([low, high]),
            fmt="D",
            color="#4527a0",
            ecolor="#4527a0",
            capsize=4,
            markersize=4,
            gid=f"median:{name}",
        )
        ax_m.axvline(0.0, color="#999999", linewidth=0.8)
        ax_m.set_yticks(y, [f"{r.label} ({r.count:,})" for r in rows], fontsize=7)
        ax_m.invert_yaxis()
        ax_m.set_xlabel("median dh (m), bars: 95 % interval", fontsize=7)
        ax_m.set_title(f"by {name}", fontsize=9, loc="left")
        ax_n.barh(y, [r.nmad for r in rows], color="#ffb74d", gid=f"nmad:{name}")
        ax_n.set_yticks(y, [])
        ax_n.invert_yaxis()
        ax_n.set_xlabel("NMAD (m)", fontsize=7)
        for a in (ax_m, ax_n):
            a.tick_params(labelsize=7)
    fig.suptitle(title, fontsize=10)
    return fig


def verdict_map(tiles: Sequence[tuple[str, Bounds, str]], *, title: str) -> Figure:
    fig = new_figure(7.0, 6.2)
    ax = fig.add_axes(MAP_AXES)
    for tile_id, bounds, verdict in tiles:
        rect = _tile_rect(bounds)
        rect.set(facecolor=VERDICT_COLOURS.get(verdict, "white"), edgecolor="white", linewidth=0.4)
        rect.set_gid(f"tile:{tile_id}:{verdict}")
        ax.add_patch(rect)
    present = [v for v in compute.VERDICT_ORDER if any(t[2] == v for t in tiles)]
    counts = {v: sum(t[2] == v for t in tiles) for v in present}
    ax.legend(
        handles=[
            Patch(facecolor=VERDICT_COLOURS[v], edgecolor="#666666", label=f"{v} ({counts[v]})")
            for v in present
        ],
        loc="upper left",
        bbox_to_anchor=(1.01, 1.0),
        fontsize=7,
    )
    ax.set_xlim(min(t[1][0] for t in tiles), max(t[1][2] for t in tiles))
    ax.set_ylim(min(t[1][1] for t in tiles), max(t[1][3] for t in tiles))
    ax.set_title(title, fontsize=10)
    _projected_axes(ax)
    return fig


def before_after(changes: Sequence[Mapping[str, Any]], *, title: str) -> Figure:
    height = 1.6 + 0.35 * len(changes)
    fig = new_figure(8.0, height)
    fig.subplots_adjust(left=0.25, right=0.97, bottom=0.6 / height, top=1 - 0.5 / height)
    axes = fig.subplots(1, 2, sharey=True)
    y = np.arange(len(changes))
    for ax, key in zip(axes, ("median", "nmad"), strict=True):
        before = np.array([c[key][0] for c in changes])
        after = np.array([c[key][1] for c in changes])
        ax.hlines(y, before, after, color="#888888", linewidth=1)
        ax.plot(
            before,
            y,
            "o",
            markerfacecolor="white",
            color="#37474f",
            label="before",
            gid=f"before:{key}",
        )
        colours = [VERDICT_COLOURS.get(c["verdict"], "black") for c in changes]
        ax.scatter(after, y, c=colours, zorder=3, label="after", gid=f"after:{key}")
        ax.set_xlabel(f"{key} dh (m)" if key == "median" else "NMAD (m)", fontsize=7)
        ax.tick_params(labelsize=7)
    axes[0].set_yticks(y, [f"{c['region']} ({c['verdict']})" for c in changes])
    axes[0].invert_yaxis()
    axes[0].legend(fontsize=7)
    fig.suptitle(title, fontsize=10)
    return fig


def tile_shifts(
    x: NDArray[np.float64],
    y: NDArray[np.float64],
    u: NDArray[np.float64],
    v: NDArray[np.float64],
    outlier: Sequence[bool],
    *,
    title: str,
) -> Figure:
    fig = new_figure(7.0, 6.0)
    ax = fig.add_axes(MAP_AXES)
    colour = ["#c2185b" if o else "#263238" for o in outlier]
    ax.quiver(x, y, u, v, color=colour, angles="xy")
    ax.set_title(title, fontsize=10)
    _projected_axes(ax)
    return fig
