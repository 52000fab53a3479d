"""Drawing of the chart figures (matplotlib, Agg): the dh histogram with its two Gaussians, the
median and NMAD by stratum with their intervals, and the regions before/after a re-check.
Nothing here computes a statistic.

Artists the tests look for carry a ``gid``: ``gauss:moments`` / ``gauss:robust`` for the two
curves, ``median:<panel>`` / ``nmad:<panel>`` for the strata, ``before:<key>`` /
``after:<key>`` for the re-check.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
from matplotlib.axes import Axes
from matplotlib.figure import Figure
from matplotlib.ticker import LogLocator, MaxNLocator
from numpy.typing import NDArray

from demaudit.workers.outputs.figures import compute
from demaudit.workers.outputs.figures.draw import (
    NICE_STEPS,
    VERDICT_COLOURS,
    new_figure,
    set_title,
)

MEDIAN_COLOUR = "#4527a0"
NMAD_COLOUR = "#ffb74d"
NMAD_BAR_COLOUR = "#8d4e00"
#: at most this many intervals along a panel's value axis (matplotlib's default puts 8-10 ticks
#: on these narrow panels; each tick and label costs ~1-2 ms to draw)
PANEL_TICK_BINS = 5


def histogram(h: compute.Histogram, *, log_counts: bool, title: str) -> Figure:
    fig = new_figure(7.5, 4.6)
    fig.subplots_adjust(left=0.1, right=0.97, bottom=0.12, top=0.92)
    ax = fig.add_subplot()
    ax.stairs(h.counts, h.edges, fill=True, color="#b0bec5", label="pixels (merged histogram)")
    for gid, curve, style, label in (
        ("gauss:moments", h.gauss_moments, "-", f"mean {h.mean:.3f} m, std {h.std:.3f} m"),
        ("gauss:robust", h.gauss_robust, "--", f"median {h.median:.3f} m, NMAD {h.nmad:.3f} m"),
    ):
        colour = "#6a1b9a" if gid == "gauss:moments" else "#e65100"
        ax.plot(
            h.x, curve, color=colour, linewidth=1.4, linestyle=style, gid=gid,
            label=f"Gaussian, {label}",
        )  # fmt: skip
    if log_counts:
        ax.set_yscale("log")
        # minor ticks at 2 and 5 of each decade (the default 2..9 costs ~40 ms more to draw)
        ax.yaxis.set_minor_locator(LogLocator(subs=(2.0, 5.0)))
        positive = h.counts[h.counts > 0]
        if positive.size:
            ax.set_ylim(max(0.5, float(positive.min()) / 2), float(positive.max()) * 3)
    ax.set_xlabel("dh = test - reference (m)")
    ax.set_ylabel("pixels per bar" + (" (log scale)" if log_counts else ""))
    ax.legend(fontsize=7, loc="upper right")
    set_title(ax, title)
    beyond = f"beyond the window: {h.below:,} below, {h.above:,} above"
    ax.text(0.01, 0.98, beyond, transform=ax.transAxes, fontsize=7, va="top")
    return fig


def interval_errors(
    centres: Sequence[float], intervals: Sequence[tuple[float | None, float | None] | None]
) -> NDArray[np.float64]:
    """Error-bar lengths (2 x n: below, above) of intervals around centres; 0 where an interval
    or one of its ends is unknown."""
    low = [
        c - ci[0] if ci is not None and ci[0] is not None else 0.0
        for c, ci in zip(centres, intervals, strict=True)
    ]
    high = [
        ci[1] - c if ci is not None and ci[1] is not None else 0.0
        for c, ci in zip(centres, intervals, strict=True)
    ]
    return np.vstack([np.asarray(low, dtype=float), np.asarray(high, dtype=float)])


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
        ax_m, ax_n = fig.add_subplot(grid[i, 0]), fig.add_subplot(grid[i, 1])
        _median_panel(ax_m, name, rows)
        _nmad_panel(ax_n, name, rows)
    fig.suptitle(title, fontsize=10)
    return fig


def _median_panel(ax: Axes, name: str, rows: Sequence[compute.StratumRow]) -> None:
    y = np.arange(len(rows))
    medians = [r.median for r in rows]
    ax.errorbar(
        medians,
        y,
        xerr=interval_errors(medians, [r.median_ci for r in rows]),
        fmt="D",
        color=MEDIAN_COLOUR,
        ecolor=MEDIAN_COLOUR,
        capsize=4,
        markersize=4,
        gid=f"median:{name}",
    )
    ax.axvline(0.0, color="#999999", linewidth=0.8)
    ax.xaxis.set_major_locator(MaxNLocator(nbins=PANEL_TICK_BINS, steps=NICE_STEPS))
    ax.set_yticks(y, [f"{r.label} ({r.count:,})" for r in rows], fontsize=7)
    ax.invert_yaxis()
    ax.set_xlabel("median dh (m), bars: 95 % interval", fontsize=7)
    set_title(ax, f"by {name}", fontsize=9, loc="left")
    ax.tick_params(labelsize=7)


def _nmad_panel(ax: Axes, name: str, rows: Sequence[compute.StratumRow]) -> None:
    y = np.arange(len(rows))
    nmads = [r.nmad for r in rows]
    errors = interval_errors(nmads, [r.nmad_ci for r in rows])
    ax.barh(y, nmads, color=NMAD_COLOUR, gid=f"nmad:{name}")
    ax.errorbar(
        nmads,
        y,
        xerr=errors,
        fmt="none",
        ecolor=NMAD_BAR_COLOUR,
        capsize=3,
        linewidth=1,
        gid=f"nmad-ci:{name}",
    )
    ax.set_yticks(y, [])
    ax.xaxis.set_major_locator(MaxNLocator(nbins=PANEL_TICK_BINS, steps=NICE_STEPS))
    ax.invert_yaxis()
    ax.set_xlabel("NMAD (m), bars: 95 % interval (asymptotic SE)", fontsize=7)
    ax.tick_params(labelsize=7)


def before_after(changes: Sequence[Mapping[str, Any]], *, title: str) -> Figure:
    height = 1.6 + 0.35 * len(changes)
    fig = new_figure(8.0, height)
    fig.subplots_adjust(left=0.25, right=0.97, bottom=0.6 / height, top=1 - 0.5 / height)
    axes = fig.subplots(1, 2, sharey=True)
    y = np.arange(len(changes))
    colours = [VERDICT_COLOURS.get(c["verdict"], "black") for c in changes]
    for ax, key in zip(axes, ("median", "nmad"), strict=True):
        before = np.array([c[key][0] for c in changes])
        after = np.array([c[key][1] for c in changes])
        ax.hlines(y, before, after, color="#888888", linewidth=1)
        ax.plot(
            before, y, "o", markerfacecolor="white", color="#37474f", label="before",
            gid=f"before:{key}",
        )  # fmt: skip
        ax.scatter(after, y, c=colours, zorder=3, label="after", gid=f"after:{key}")
        ax.set_xlabel(f"{key} dh (m)" if key == "median" else "NMAD (m)", fontsize=7)
        ax.tick_params(labelsize=7)
        ax.xaxis.set_major_locator(MaxNLocator(nbins=PANEL_TICK_BINS, steps=NICE_STEPS))
    axes[0].set_yticks(y, [f"{c['region']} ({c['verdict']})" for c in changes])
    axes[0].invert_yaxis()
    axes[0].legend(fontsize=7)
    fig.suptitle(title, fontsize=10)
    return fig
