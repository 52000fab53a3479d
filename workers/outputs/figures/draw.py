"""Drawing of the map figures (matplotlib, Agg, no pyplot state): the dh map, the tile maps,
the re-check verdict map and the shift vectors. Each function takes what
:mod:`~demaudit.workers.outputs.figures.compute` and
:mod:`~demaudit.workers.outputs.figures.geometry` worked out and returns a Figure; nothing here
computes a statistic. The charts (histogram, strata, before/after) are in
:mod:`~demaudit.workers.outputs.figures.charts`.

Artists the tests look for carry a ``gid``: ``region:<id>`` for each region outline,
``tiles`` for the tile map's collection, ``tile:<id>:<verdict>``, ``worst:<id>``, ``scale-bar``,
``inset``, ``failed:<id>`` / ``not-audited:<id>`` / ``no-value:<id>`` for tiles without results.

Speed: no layout engine, titles placed at a fixed height (matplotlib otherwise measures every
tick label to place them), tiles drawn as one polygon collection, outlines added without
widening the data limits, at most ~6 coordinate ticks a side (text is most of the drawing time).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Literal

import matplotlib

matplotlib.use("Agg")
# glyphs rasterised without hinting (FreeType hints every glyph): ~10 % less drawing time
matplotlib.rcParams["text.hinting"] = "no_hinting"
import numpy as np  # noqa: E402
from matplotlib.axes import Axes  # noqa: E402
from matplotlib.collections import PolyCollection  # noqa: E402
from matplotlib.colors import BoundaryNorm, Colormap, ListedColormap, Normalize  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402
from matplotlib.patches import Patch, PathPatch, Rectangle  # noqa: E402
from matplotlib.path import Path as MplPath  # noqa: E402
from matplotlib.ticker import MaxNLocator  # noqa: E402
from numpy.typing import NDArray  # noqa: E402
from shapely.geometry.base import BaseGeometry  # noqa: E402

from demaudit.workers.checkpoints.grading import ASPRS_CLASSES_CM  # noqa: E402
from demaudit.workers.outputs.figures import compute  # noqa: E402
from demaudit.workers.outputs.figures.geometry import (  # noqa: E402
    Bounds,
    MapFrame,
    ScaleBar,
    tile_corners,
)

# our palette: a blue-to-ochre diverging scale for dh, grey voids, hatched failures
DH_CMAP = "PuOr_r"
SPREAD_CMAP = "YlOrBr"
VOID_COLOUR = "#c8c8c8"
UNDER_COLOUR = "#241a4d"
OVER_COLOUR = "#4d2600"
MISSING_EDGE = "#333333"
VERDICT_COLOURS = {
    "regressed": "#c2185b",
    "improved": "#2e7d32",
    "unchanged": "#90a4ae",
    "new": "#1565c0",
    "removed": "#5d4037",
    "reused": "#eceff1",
}

Region = tuple[str, str, BaseGeometry]
MAP_AXES = (0.12, 0.08, 0.64, 0.85)
BAR_AXES = (0.80, 0.14, 0.025, 0.72)
#: coordinate intervals along a map's side, at most (~9 ticks crowd 7-digit labels; ~1-2 ms each)
MAP_TICK_BINS = 5
NICE_STEPS = (1, 2, 2.5, 5, 10)  # tick steps (x a power of ten), as matplotlib's AutoLocator


def new_figure(width: float, height: float) -> Figure:
    """A figure without a layout engine: the axes are placed by hand (a layout engine doubles
    the drawing time)."""
    return Figure(figsize=(width, height))


def set_title(
    ax: Axes, text: str, *, fontsize: float = 10, loc: Literal["left", "center"] = "center"
) -> None:
    """A title at a fixed height above the axes (no automatic placement, which measures every
    tick label of the figure)."""
    ax.set_title(text, fontsize=fontsize, loc=loc, y=1.0, pad=5)


def map_axes(ax: Axes, frame: MapFrame) -> None:
    ax.set_aspect(frame.aspect)
    for axis in (ax.xaxis, ax.yaxis):
        axis.set_major_locator(MaxNLocator(nbins=MAP_TICK_BINS, steps=NICE_STEPS))
    ax.set_xlabel(frame.x_label)
    ax.set_ylabel(frame.y_label)
    ax.ticklabel_format(useOffset=False, style="plain")
    ax.tick_params(labelsize=7)


def fit_to(ax: Axes, bounds: Sequence[Bounds]) -> None:
    """Axis limits around every rectangle."""
    b = np.asarray(bounds, dtype=float).reshape(-1, 4)
    ax.set_xlim(float(b[:, 0].min()), float(b[:, 2].max()))
    ax.set_ylim(float(b[:, 1].min()), float(b[:, 3].max()))


def add_shape(ax: Axes, patch: Patch) -> None:
    """Add a patch without widening the data limits: every map sets its limits by hand, and
    add_patch walks each outline's segments as Bezier curves (~0.2 s for a few detailed regions)."""
    ax.add_artist(patch)


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


def draw_regions(ax: Axes, regions: Sequence[Region]) -> int:
    """Each region's outline (one patch each) and its id at a point inside it."""
    label_box = {"boxstyle": "round,pad=0.15", "fc": "white", "alpha": 0.7}
    for region_id, _name, geometry in regions:
        patch = PathPatch(
            geometry_path(geometry), fill=False, edgecolor="black", linewidth=1.1, zorder=4
        )
        patch.set_gid(f"region:{region_id}")
        add_shape(ax, patch)
        point = geometry.representative_point()
        ax.annotate(
            region_id,
            (point.x, point.y),
            ha="center",
            va="center",
            fontsize=8,
            zorder=5,
            fontweight="bold",
            bbox=label_box,
        )
    return len(regions)


def hatched_tile(bounds: Bounds, hatch: str, gid: str, *, zorder: float = 3) -> Rectangle:
    left, bottom, right, top = bounds
    rect = Rectangle(
        (left, bottom),
        right - left,
        top - bottom,
        facecolor="white",
        edgecolor=MISSING_EDGE,
        hatch=hatch,
        linewidth=0.6,
        zorder=zorder,
    )
    rect.set_gid(gid)
    return rect


def draw_scale_bar(ax: Axes, extent: Bounds, bar: ScaleBar) -> None:
    """Two halves, dark and light, bar.length_units long, in the lower left corner."""
    left, bottom, right, top = extent
    x0 = left + 0.04 * (right - left)
    y0 = bottom + 0.04 * (top - bottom)
    h = 0.012 * (top - bottom)
    half = bar.length_units / 2
    for i, colour in enumerate(("black", "white")):
        part = Rectangle(
            (x0 + i * half, y0), half, h, facecolor=colour, edgecolor="black", linewidth=0.8
        )
        part.set(zorder=6, gid="scale-bar" if i == 0 else "scale-bar-half")
        add_shape(ax, part)
    ax.text(x0 + half, y0 + 1.6 * h, bar.label, ha="center", va="bottom", fontsize=8, zorder=6)


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
    set_title(inset, f"lon {clon:.2f}°, lat {clat:.2f}°", fontsize=6)
    return inset


@dataclass(frozen=True)
class MapLayers:
    """What the dh map shows over the dh values."""

    frame: MapFrame
    regions: Sequence[Region] = ()
    failed: Sequence[tuple[str, Bounds]] = ()
    not_audited: Sequence[tuple[str, Bounds]] = ()
    scale_bar: ScaleBar | None = None
    lonlat: tuple[NDArray[np.float64], NDArray[np.float64]] | None = None


def dh_map(
    values: NDArray[np.float64],
    extent: Bounds,
    limits: compute.Limits,
    layers: MapLayers,
    *,
    title: str,
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
    _map_overlays(ax, extent, layers)
    bar = fig.colorbar(image, cax=fig.add_axes(BAR_AXES), extend="both")
    bar.set_label(
        f"dh = test - reference (m); colours clipped at {limits.low:.3f} and {limits.high:.3f} m\n"
        f"({limits.rule}); darker ends: beyond",
        fontsize=7,
    )
    ax.legend(handles=_map_legend(layers), loc="upper left", fontsize=7, framealpha=0.85)
    set_title(ax, title)
    ax.set_xlim(left, right)
    ax.set_ylim(bottom, top)
    map_axes(ax, layers.frame)
    return fig


def _map_overlays(ax: Axes, extent: Bounds, layers: MapLayers) -> None:
    for tile_id, bounds in layers.failed:
        add_shape(ax, hatched_tile(bounds, "xxx", f"failed:{tile_id}"))
    for tile_id, bounds in layers.not_audited:
        add_shape(ax, hatched_tile(bounds, "///", f"not-audited:{tile_id}"))
    draw_regions(ax, layers.regions)
    if layers.scale_bar is not None:
        draw_scale_bar(ax, extent, layers.scale_bar)
    if layers.lonlat is not None:
        draw_inset(ax, *layers.lonlat)


def _map_legend(layers: MapLayers) -> list[Patch]:
    handles = [Patch(facecolor=VOID_COLOUR, label="void: no valid dh")]
    for present, hatch, label in (
        (layers.failed, "xxx", "failed tile"),
        (layers.not_audited, "///", "tile not audited"),
    ):
        if present:
            handles.append(
                Patch(facecolor="white", edgecolor=MISSING_EDGE, hatch=hatch, label=label)
            )
    if layers.regions:
        handles.append(Patch(facecolor="none", edgecolor="black", label="region outline"))
    return handles


def _tile_colours(statistic: str, value_range: tuple[float, float]) -> tuple[Colormap, Normalize]:
    if statistic == "grade":
        labels = grade_labels()
        cmap: Colormap = ListedColormap(
            matplotlib.colormaps["viridis"](np.linspace(0, 1, len(labels)))
        )
        return cmap, BoundaryNorm(np.arange(len(labels) + 1) - 0.5, cmap.N)
    cmap = matplotlib.colormaps[DH_CMAP if statistic == "median" else SPREAD_CMAP]
    return cmap, Normalize(*value_range)


def grade_labels() -> list[str]:
    return [f"{cm:g} cm" for cm in ASPRS_CLASSES_CM] + [f">{ASPRS_CLASSES_CM[-1]:g} cm"]


def tile_map(
    values: Sequence[compute.TileValue],
    statistic: str,
    value_range: tuple[float, float],
    worst: Sequence[str],
    *,
    title: str,
    frame: MapFrame,
) -> Figure:
    fig = new_figure(7.0, 6.2)
    ax = fig.add_axes(MAP_AXES)
    known = [v for v in values if v.value is not None]
    cmap, norm = _tile_colours(statistic, value_range)
    collection = PolyCollection(
        list(tile_corners([v.bounds for v in known])),
        cmap=cmap,
        norm=norm,
        edgecolor="white",
        linewidth=0.4,
    )
    collection.set_array(np.array([v.value for v in known], dtype=float))
    collection.set_gid("tiles")
    ax.add_collection(collection)
    _mark_unknown_tiles(ax, values)
    _label_worst(fig, ax, values, worst)
    _tile_bar(fig, collection, statistic)
    fit_to(ax, [v.bounds for v in values])
    set_title(ax, title)
    map_axes(ax, frame)
    return fig


def _mark_unknown_tiles(ax: Axes, values: Sequence[compute.TileValue]) -> None:
    unknown = [v for v in values if v.value is None]
    for v in unknown:
        add_shape(ax, hatched_tile(v.bounds, "xxx", f"no-value:{v.tile}"))
    if unknown:
        hatch = Patch(facecolor="white", edgecolor=MISSING_EDGE, hatch="xxx")
        ax.legend([hatch], ["no statistics (failed or not audited)"], loc="lower left", fontsize=7)


def _label_worst(
    fig: Figure, ax: Axes, values: Sequence[compute.TileValue], worst: Sequence[str]
) -> None:
    """The worst tiles' ranks on the map, their ids below it."""
    by_id = {v.tile: v for v in values}
    badge = {"boxstyle": "circle,pad=0.2", "fc": "white", "ec": "#c2185b", "alpha": 0.9}
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
            bbox=badge,
        )
    if worst:
        ids = ", ".join(f"{rank} {t}" for rank, t in enumerate(worst, 1))
        fig.text(MAP_AXES[0], 0.012, f"worst: {ids}", fontsize=7)


def _tile_bar(fig: Figure, collection: PolyCollection, statistic: str) -> None:
    bar = fig.colorbar(collection, cax=fig.add_axes(BAR_AXES))
    if statistic == "grade":
        labels = grade_labels()
        bar.set_ticks(list(range(len(labels))), labels=labels)
        bar.set_label("finest ASPRS class met by the tile's RMSE (indicative)", fontsize=7)
    else:
        bar.set_label(f"{statistic} of the tile's dh (m)", fontsize=7)


def verdict_map(tiles: Sequence[tuple[str, Bounds, str]], *, title: str, frame: MapFrame) -> Figure:
    fig = new_figure(7.0, 6.2)
    ax = fig.add_axes(MAP_AXES)
    for tile_id, (left, bottom, right, top), verdict in tiles:
        rect = Rectangle((left, bottom), right - left, top - bottom)
        rect.set(facecolor=VERDICT_COLOURS.get(verdict, "white"), edgecolor="white", linewidth=0.4)
        rect.set_gid(f"tile:{tile_id}:{verdict}")
        add_shape(ax, rect)
    counts = {v: sum(t[2] == v for t in tiles) for v in compute.VERDICT_ORDER}
    handles = [
        Patch(facecolor=VERDICT_COLOURS[v], edgecolor="#666666", label=f"{v} ({n})")
        for v, n in counts.items()
        if n
    ]
    ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize=7)
    fit_to(ax, [t[1] for t in tiles])
    set_title(ax, title)
    map_axes(ax, frame)
    return fig


def tile_shifts(
    x: NDArray[np.float64],
    y: NDArray[np.float64],
    u: NDArray[np.float64],
    v: NDArray[np.float64],
    outlier: Sequence[bool],
    *,
    title: str,
    frame: MapFrame,
) -> Figure:
    fig = new_figure(7.0, 6.0)
    ax = fig.add_axes(MAP_AXES)
    colour = ["#c2185b" if o else "#263238" for o in outlier]
    ax.quiver(x, y, u, v, color=colour, angles="xy")
    set_title(ax, title)
    map_axes(ax, frame)
    return fig
