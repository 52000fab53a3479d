"""Reporting for the throughput benchmark (bench_throughput.py): the phases of one tile timed in
this process, marginal throughputs, and the printed table."""

from __future__ import annotations

import datetime as dt
import math
import os
import platform
import statistics
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import rasterio
from throughput_archives import REPROJECTED, SAME_GRID
from tile_loop import tile_calls

REPEATS = 3


@dataclass
class Run:
    contender: str
    kind: str
    size: int
    pixels: int
    seconds: float
    peak_mib: float
    output: str = ""
    load: float = 0.0
    ok: bool = True  # a failed run (exit status not 0) counts in no figure
    round_no: int = 0  # with --repeat: the round it ran in (contenders side by side)
    #: demaudit runs: the job's own clock (summary.json job.timings_s), seconds per phase
    timings: dict[str, float] | None = None


# -- phases of one tile -------------------------------------------------------------------------


def best_of(fn: Callable[[], Any]) -> tuple[float, Any]:
    best, value = math.inf, None
    for _ in range(REPEATS):
        started = time.perf_counter()
        value = fn()
        best = min(best, time.perf_counter() - started)
    return best, value


def phases(spec_path: Path) -> list[tuple[str, float]]:
    """Seconds per phase of the first test tile, calling the worker functions directly (as
    task.tile_surfaces and audit_tile call them: float32 kept when the options allow)."""
    from demaudit.workers.tile import reference as ref_side
    from demaudit.workers.tile import task as tile_task
    from demaudit.workers.tile.datum import vertical_offset_on_grid
    from demaudit.workers.tile.difference import block_mean, difference

    (test, refs, regions, options) = tile_calls(spec_path, 1)[0]  # the job's first test tile
    keep = ref_side.keeps_float32(options)
    out: list[tuple[str, float]] = []
    seconds, heights = best_of(lambda: ref_side.test_heights(test, options, keep_float32=keep))
    out.append(("read test tile", seconds))
    seconds, mosaics = best_of(
        lambda: ref_side.read_mosaics(
            refs, test.grid, nodata=None, units=options.reference_units, keep_float32=keep
        )
    )
    out.append((f"read reference ({len(refs)} tile(s))", seconds))
    seconds, aligned = best_of(
        lambda: ref_side.mosaics_onto(mosaics, test.grid, resampling=options.resampling)
    )
    out.append(("align (warp onto the test grid)", seconds))
    seconds, offset = best_of(
        lambda: vertical_offset_on_grid(
            test.grid,
            from_crs=options.reference_vertical_crs,
            to_crs=options.test_vertical_crs,
            grid_dirs=options.grid_dirs,
        )
    )
    out.append(("datum (geoid offset)", seconds))
    reference = aligned if offset is None else aligned + offset
    seconds, dh = best_of(lambda: difference(heights, reference))
    out.append(("difference", seconds))
    layers = tile_task.TileSurfaces(dh, reference, None, heights)
    seconds, _ = best_of(lambda: tile_task.summarise_tile(test, layers, regions, options))
    out.append(("slope, strata, summaries, overview (summarise_tile)", seconds))
    seconds, _ = best_of(lambda: block_mean(dh, options.overview_factor))
    out.append(("  of which overview (block mean)", seconds))
    seconds, _ = best_of(lambda: tile_task.audit_tile(test, refs, regions, options))
    out.append(("whole audit_tile", seconds))
    return out


# -- report -------------------------------------------------------------------------------------


@dataclass
class Marginal:
    mpix_s: float
    peaks: tuple[float, float]


def fastest_pair(runs: Sequence[Run], contender: str, kind: str) -> tuple[Run, Run] | None:
    """The fastest completed run of the small and of the large size (with --repeat, the ones
    least slowed by other processes); None without both sizes."""
    mine = [r for r in runs if r.contender == contender and r.kind == kind and r.ok]
    sizes = sorted({r.size for r in mine})
    if len(sizes) < 2:
        return None
    small = min((r for r in mine if r.size == sizes[0]), key=lambda r: r.seconds)
    big = min((r for r in mine if r.size == sizes[-1]), key=lambda r: r.seconds)
    return small, big


def marginal(runs: Sequence[Run], contender: str, kind: str) -> Marginal | None:
    """Extra pixels / extra seconds between the two sizes, each size's fastest completed run."""
    pair = fastest_pair(runs, contender, kind)
    if pair is None:
        return None
    small, big = pair
    if big.seconds <= small.seconds:
        return None
    return Marginal(
        (big.pixels - small.pixels) / (big.seconds - small.seconds) / 1e6,
        (small.peak_mib, big.peak_mib),
    )


def machine_facts() -> list[str]:
    with open("/proc/meminfo") as fh:
        total_kib = int(fh.readline().split()[1])
    return [
        f"cores: {os.cpu_count()}, memory {total_kib / 2**20:.1f} GiB, python "
        f"{platform.python_version()}, numpy {np.__version__}, rasterio {rasterio.__version__}",
        "load average (1/5/15 min): " + ", ".join(f"{v:.2f}" for v in os.getloadavg()),
    ]


def report(
    runs: Sequence[Run],
    sizes: Sequence[int],
    pixels: int,
    phase_table: dict[str, list[tuple[str, float]]],
    command: str,
) -> str:
    lines = [
        "=" * 100,
        f"demaudit throughput benchmark, {dt.datetime.now(dt.UTC).isoformat(timespec='seconds')}",
        f"command: {command}",
    ]
    lines += machine_facts()
    lines.append(
        f"sizes: {sizes[0]} and {sizes[1]} test tiles of {pixels} x {pixels} px; "
        "marginal = extra pixels / extra seconds (each size's fastest run)"
    )
    lines += ["", *contender_table(runs), "", *ratio_lines(runs), *phase_split_lines(runs)]
    for kind, table in phase_table.items():
        lines.append("")
        lines.append(
            f"phases of one {pixels} px tile, {kind} (best of {REPEATS}, this process, seconds):"
        )
        for name, seconds in table:
            lines.append(f"  {name:<52}{seconds:8.3f}")
    naive_out = [r for r in runs if r.contender == "naive" and r.output.strip()]
    if naive_out:
        lines.append("")
        lines.append("naive script's overall figures (a sanity check against summary.json):")
        for r in naive_out:
            lines.append(f"  {r.kind} {r.size} tiles: {r.output.strip()}")
    lines.append("=" * 100)
    return "\n".join(lines)


#: In the order the tables list them.
CONTENDERS = ("decode", "decode-own", "decode+warp", "naive", "demaudit-w2", "demaudit-w1")


def contender_table(runs: Sequence[Run]) -> list[str]:
    """One row per archive and contender: marginal throughput, peaks, every run's seconds and
    the 1-minute load average at its end."""
    lines = [
        f"{'archive':<13}{'contender':<14}{'marginal Mpix/s':>16}"
        f"{'peak MiB small -> large':>26}   {'seconds small / large (load 1 min)'}"
    ]
    for kind in (SAME_GRID, REPROJECTED):
        for contender in CONTENDERS:
            mine = sorted(
                (r for r in runs if r.contender == contender and r.kind == kind),
                key=lambda r: r.size,
            )
            if not mine:
                continue
            m = marginal(runs, contender, kind)
            rate = f"{m.mpix_s:.2f}" if m else "n/a"
            if not all(r.ok for r in mine):
                rate += " (FAILED runs left out)" if m else " FAILED"
            peaks = f"{mine[0].peak_mib:,.0f} -> {mine[-1].peak_mib:,.0f}"
            secs = " / ".join(f"{r.seconds:.1f} ({r.load:.1f})" for r in mine)
            lines.append(f"{kind:<13}{contender:<14}{rate:>16}{peaks:>26}   {secs}")
    return lines


def ratio_lines(runs: Sequence[Run]) -> list[str]:
    """demaudit (2 workers) against the limit and the naive script; 2 workers against 1."""
    lines = []
    for kind, limit in ((SAME_GRID, "decode"), (REPROJECTED, "decode+warp")):
        d2, d1 = marginal(runs, "demaudit-w2", kind), marginal(runs, "demaudit-w1", kind)
        lim, naive = marginal(runs, limit, kind), marginal(runs, "naive", kind)
        parts = [f"{kind}:"]
        if d2 and lim:
            parts.append(f"demaudit/{limit} {d2.mpix_s / lim.mpix_s:.2f}")
        own = marginal(runs, "decode-own", kind) if kind == SAME_GRID else None
        if d2 and own:
            parts.append(f"demaudit/decode-own {d2.mpix_s / own.mpix_s:.2f}")
        if d2 and naive:
            parts.append(f"demaudit/naive {d2.mpix_s / naive.mpix_s:.2f}")
        if d2 and d1:
            parts.append(f"2 workers / 1 worker {d2.mpix_s / d1.mpix_s:.2f}")
        if len(parts) > 1:
            lines.append("  ".join(parts))
        paired = round_ratios(runs, kind, limit)
        if paired:
            lines.append(f"  per round ({kind}): {paired}")
    return lines


def round_ratios(runs: Sequence[Run], kind: str, limit: str) -> str:
    """With more than one round: demaudit's ratios within each round (contenders that ran
    minutes apart, so a machine whose speed drifts over the run moves them less) and their
    median; empty with one round."""
    rounds = sorted({r.round_no for r in runs if r.kind == kind})
    if len(rounds) < 2:
        return ""
    found: dict[str, list[float]] = {f"demaudit/{limit}": [], "2 workers / 1 worker": []}
    for n in rounds:
        mine = [r for r in runs if r.round_no == n]
        d2, d1 = marginal(mine, "demaudit-w2", kind), marginal(mine, "demaudit-w1", kind)
        lim = marginal(mine, limit, kind)
        if d2 and lim:
            found[f"demaudit/{limit}"].append(d2.mpix_s / lim.mpix_s)
        if d2 and d1:
            found["2 workers / 1 worker"].append(d2.mpix_s / d1.mpix_s)
    return "  ".join(
        f"{name} {' / '.join(f'{v:.2f}' for v in values)} (median {statistics.median(values):.2f})"
        for name, values in found.items()
        if values
    )


#: The job clock's phases shown on their own; the others are summed as "rest of the job".
_OWN_PHASES = (("catalog_and_coregistration", "catalog"), ("tiles", "tiles"))


def phase_split_lines(runs: Sequence[Run]) -> list[str]:
    """Where demaudit's extra seconds go between the two sizes (the runs the marginal figures
    use), by the job's own clock: catalog (headers and fingerprints on the cluster), the tile
    phase, the rest of the job (totals, tables, figures, report), and the run outside the job
    clock (interpreter, imports, cluster start and stop); with both worker counts, how much
    faster 2 workers did each part than 1."""
    lines = []
    for kind in (SAME_GRID, REPROJECTED):
        extra: dict[str, dict[str, float]] = {}
        for contender in ("demaudit-w2", "demaudit-w1"):
            pair = fastest_pair(runs, contender, kind)
            if pair is None or pair[0].timings is None or pair[1].timings is None:
                continue
            extra[contender] = _extra_by_part(*pair)
        if not extra:
            continue
        tiles = max(r.size for r in runs if r.kind == kind) - min(
            r.size for r in runs if r.kind == kind
        )
        lines.append(f"extra seconds between the sizes by the job's clock ({kind}, {tiles} tiles):")
        for contender, parts in extra.items():
            shown = "  ".join(f"{name} {seconds:.2f}" for name, seconds in parts.items())
            lines.append(f"  {contender:<12}{shown}")
        if len(extra) == 2:
            two, one = extra["demaudit-w2"], extra["demaudit-w1"]
            gains = "  ".join(
                f"{name} {one[name] / two[name]:.2f}" for name in two if two[name] > 0.05
            )
            lines.append(f"  1 worker's / 2 workers' extra seconds: {gains}")
    return lines


def _extra_by_part(small: Run, big: Run) -> dict[str, float]:
    parts = {}
    for run, sign in ((big, 1.0), (small, -1.0)):
        timings = run.timings or {}
        own = {label: timings.get(key, 0.0) for key, label in _OWN_PHASES}
        rest = sum(timings.values()) - sum(own.values())
        outside = run.seconds - sum(timings.values())
        for name, seconds in (*own.items(), ("rest of the job", rest), ("outside", outside)):
            parts[name] = parts.get(name, 0.0) + sign * seconds
    return parts
