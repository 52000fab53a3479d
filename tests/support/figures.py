"""Shared set-ups of the figure tests: heavy-tailed dh, numpy's robust limits, a few tiles
and a figure context over them."""

from __future__ import annotations

import numpy as np

from demaudit.workers.outputs import figures
from demaudit.workers.stats import summary as dhs

NMAD = 1.4826  # 1 / Phi^-1(0.75): Höhle & Höhle (2009)


def heavy_tailed(n: int = 60_000, seed: int = 1) -> np.ndarray:
    # 85 % N(0.2, 0.3) and 15 % blunders N(8, 6): a heavy right tail (invented, common practice)
    rng = np.random.default_rng(seed)
    core = rng.normal(0.2, 0.3, int(n * 0.85))
    tail = rng.normal(8.0, 6.0, n - core.size)
    return np.concatenate([core, tail])


def numpy_limits(x: np.ndarray, k: float = 3.0) -> tuple[float, float]:
    """median +- k x NMAD with numpy alone (NMAD = 1.4826 x median |x - median|)."""
    median = float(np.median(x))
    nmad = NMAD * float(np.median(np.abs(x - median)))
    return median - k * nmad, median + k * nmad


def tiles() -> list[dict]:
    rows = []
    for i, (median, nmad, rmse) in enumerate(
        [(0.1, 0.2, 0.25), (-2.0, 0.3, 2.1), (0.5, 1.5, 1.6), (0.0, 0.1, 0.1)]
    ):
        stats = {"count": 100, "median": median, "nmad": nmad, "q95_abs": nmad * 2, "rmse": rmse}
        rows.append({"tile": f"t{i}", "status": "ok", "bounds": [i, 0, i + 1, 1], "stats": stats})
    rows.append({"tile": "bad", "status": "failed", "bounds": [4, 0, 5, 1], "stats": {}})
    return rows


def context(
    tmp_path, x: np.ndarray, regions, rows=None, *, crs: str = "EPSG:32632"
) -> figures.FigureContext:
    s = dhs.summarise(x)
    document = {"job": {"name": "t"}, "overall": dhs.statistics(s), "tiles": rows or tiles()}
    ctx = figures.FigureContext(tmp_path, document, s, {}, regions, crs)
    grid = x[:40_000].reshape(200, 200).copy()
    grid[:20, :20] = np.nan  # a void
    ctx.__dict__["overview"] = (grid, (0.0, 0.0, 5.0, 1.0))  # what read_overview would give
    return ctx
