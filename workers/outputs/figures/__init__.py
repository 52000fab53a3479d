"""Figures of a job for people (PNG, matplotlib Agg), and what each shows (summary.json
``figures``: file name -> metadata, e.g. the colour limits used).

Layers: :mod:`.compute` and :mod:`.geometry` work out what to draw (pure, no matplotlib),
:mod:`.draw` (maps) and :mod:`.charts` draw it, :mod:`.builders` pick each figure's inputs from
a :class:`FigureContext` (:mod:`.context`, which also reads a results folder), and this module
runs the builders of :data:`BUILDERS` and writes the files. A builder returns
``(Figure, metadata)`` or None when the results do not allow it; to add a figure (e.g. a
variogram), write a builder and append ``(file name, builder)`` to ``BUILDERS``.

Reads only what the job wrote (results.zarr and the summary document, whose spec says which
tile maps to draw: ``figures.tile_statistics``) plus what the caller passes (the merged summary,
the strata summaries, the regions in the overview's CRS), so it runs at the end of a job or
later on a results folder.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from pathlib import Path
from typing import Any

from shapely.geometry.base import BaseGeometry

from demaudit.workers.outputs.figures.builders import (
    Builder,
    Drawn,
    build_dh_map,
    build_histogram,
    build_recheck_map,
    build_recheck_regions,
    build_strata,
    build_tile_shifts,
    tile_map_builder,
)
from demaudit.workers.outputs.figures.compute import TILE_STATISTICS
from demaudit.workers.outputs.figures.context import (
    FigureContext,
    overview_crs,
    read_overview,
    stored_totals,
)
from demaudit.workers.outputs.figures.error_model import ERROR_MODEL_NAME, build_error_model
from demaudit.workers.stats import summary as dhs

__all__ = [
    "BUILDERS",
    "DPI",
    "PNG_OPTIONS",
    "Drawn",
    "FigureContext",
    "draw_figures",
    "overview_crs",
    "read_overview",
    "stored_totals",
    "tile_map_name",
    "write_figures",
]

MAP_NAME = "dh_map.png"
HISTOGRAM_NAME = "dh_histogram.png"
STRATA_NAME = "dh_by_stratum.png"
SHIFTS_NAME = "tile_shifts.png"
RECHECK_MAP_NAME = "recheck_tiles.png"
RECHECK_REGIONS_NAME = "recheck_regions.png"
DPI = 100
#: PNG encoding: zlib level 3. Measured on the six figures of a 256-tile demo job (best of 5):
#: level 6 (Pillow's default) 136 ms for 637 kB, level 3 88 ms for 649 kB, level 1 85 ms for
#: 666 kB; levels 4 and up switch zlib to its slow matching and cost a third more
PNG_OPTIONS: dict[str, Any] = {"pil_kwargs": {"compress_level": 3}}


def tile_map_name(statistic: str) -> str:
    return f"tile_{statistic}.png"


#: (file name, builder) in the order they appear in report.html; the tile maps draw only the
#: statistics the spec asks for
BUILDERS: list[tuple[str, Builder]] = [
    (MAP_NAME, build_dh_map),
    (HISTOGRAM_NAME, build_histogram),
    *[(tile_map_name(s), tile_map_builder(s)) for s in TILE_STATISTICS],
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
    return draw_figures(ctx)


def draw_figures(
    ctx: FigureContext, keep: Callable[[str], bool] = lambda name: True
) -> dict[str, dict[str, Any]]:
    """Draw and write the figures of BUILDERS whose names keep() accepts, in their order."""
    written: dict[str, dict[str, Any]] = {}
    for name, build in BUILDERS:
        if not keep(name) or not ctx.out_dir.is_dir():  # the folder goes when a job fails
            continue
        drawn = build(ctx)
        if drawn is None:
            continue
        fig, meta = drawn
        fig.savefig(ctx.out_dir / name, dpi=DPI, **PNG_OPTIONS)
        written[name] = meta
    return written
