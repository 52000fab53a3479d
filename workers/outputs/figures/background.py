"""Figures drawn while the job does other work: :func:`start_figures` draws, on one background
thread, every figure that needs only the statistics (all but the re-check figures), while the
caller samples checkpoints and builds the change report; :meth:`FigureDrawing.finish` waits for
them and draws the figures that need the final document.

The figures are the same as :func:`~demaudit.workers.outputs.figures.write_figures` draws (same
builders, same context); only the time they are drawn changes. One thread per process for all
jobs: matplotlib keeps its fonts per thread, so later jobs find them loaded, and two jobs never
draw at once (matplotlib's font objects are not shared between threads).
"""

from __future__ import annotations

import time
from collections.abc import Mapping, Sequence
from concurrent.futures import Future, ThreadPoolExecutor, wait
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

from shapely.geometry.base import BaseGeometry

from demaudit.workers.outputs.figures import (
    BUILDERS,
    RECHECK_MAP_NAME,
    RECHECK_REGIONS_NAME,
    FigureContext,
    draw_figures,
)
from demaudit.workers.stats import summary as dhs

#: the figures drawn from the final document (they show the change report)
LATE = frozenset({RECHECK_MAP_NAME, RECHECK_REGIONS_NAME})
_THREAD = ThreadPoolExecutor(max_workers=1, thread_name_prefix="demaudit-figures")

Meta = dict[str, dict[str, Any]]


@dataclass(frozen=True)
class Drawing:
    """What the background thread drew, with its own wall and CPU seconds."""

    figures: Meta
    wall_s: float
    cpu_s: float


def _draw_early(ctx: FigureContext) -> Drawing:
    wall, cpu = time.perf_counter(), time.thread_time()
    figures = draw_figures(ctx, lambda name: name not in LATE)
    return Drawing(figures, time.perf_counter() - wall, time.thread_time() - cpu)


@dataclass
class FigureDrawing:
    """Figures being drawn in the background for one job."""

    context: FigureContext
    early: Future[Drawing]

    def finish(self, document: Mapping[str, Any]) -> Meta:
        """Wait for the background figures (their errors are raised here), draw the re-check
        figures from the final document, and return file name -> metadata in BUILDERS order."""
        drawn = self.early.result()
        late = draw_figures(replace(self.context, document=document), lambda name: name in LATE)
        both = drawn.figures | late
        return {name: both[name] for name, _ in BUILDERS if name in both}

    def abandon(self) -> None:
        """The job failed: wait until the background thread no longer writes into the job's
        folder (a drawing not yet begun is cancelled), so the folder can be removed whole."""
        if not self.early.cancel():
            wait([self.early])

    @property
    def seconds(self) -> tuple[float, float] | None:
        """Wall and CPU seconds the background thread spent drawing, once it is done."""
        if not self.early.done() or self.early.exception() is not None:
            return None
        drawing = self.early.result()
        return drawing.wall_s, drawing.cpu_s


def start_figures(
    out_dir: Path,
    document: Mapping[str, Any],
    *,
    overall: dhs.DhSummary | None,
    strata: Mapping[str, dhs.DhSummary],
    regions: Sequence[tuple[str, str, BaseGeometry]] = (),
    crs: str | None = None,
) -> FigureDrawing:
    """Start drawing the figures of a job whose statistics are final (document: the summary
    document without checkpoints and change report; it must not change afterwards)."""
    ctx = FigureContext(Path(out_dir), document, overall, dict(strata), regions, crs)
    return FigureDrawing(ctx, _THREAD.submit(_draw_early, ctx))
