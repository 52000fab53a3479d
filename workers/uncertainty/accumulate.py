"""The running merge of tile error-model samples on the client (bounded memory).

The binned summaries merge, the counts and sums add, and of the sampled pixels those with the
smallest priorities are kept (at most ``max_points``: the same set whatever the order tiles
finish in, and memory flat with archive size).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray
from pyproj import CRS, Transformer

from demaudit.workers.stats import summary as dh_summary
from demaudit.workers.stats.summary import DhSummary
from demaudit.workers.uncertainty.sample import N_CURVATURE, N_SLOPE, TileErrorSample

POINT_COLUMNS = ("priority", "x", "y", "dh", "slope_deg", "curvature")


@dataclass
class ErrorModelAccumulator:
    """The running merge of tile samples (see module)."""

    max_points: int = 100_000
    slope_bins: dict[int, DhSummary] = field(default_factory=dict)
    curvature_bins: dict[int, DhSummary] = field(default_factory=dict)
    joint_bins: dict[int, DhSummary] = field(default_factory=dict)
    joint_sums: NDArray[np.float64] = field(
        default_factory=lambda: np.zeros((2, N_SLOPE * N_CURVATURE))
    )
    counts: dict[str, NDArray[np.int64]] = field(default_factory=dict)
    points: dict[str, NDArray[np.float64]] = field(default_factory=dict)  # crs -> (k, 6)
    pixel_areas: list[float] = field(default_factory=list)
    tiles: int = 0  # tiles that added at least one sampled stable pixel
    stable: int = 0
    outside_limits: int = 0

    def add(self, sample: TileErrorSample | None) -> None:
        if sample is None:
            return
        if len(sample.dh):  # a tile without stable pixels (all vegetated) adds no sample
            self.tiles += 1
        self.stable += sample.stable
        self.outside_limits += sample.outside_limits
        self.pixel_areas.append(sample.pixel_area_m2)
        for mine, theirs in (
            (self.slope_bins, sample.slope_bins),
            (self.curvature_bins, sample.curvature_bins),
            (self.joint_bins, sample.joint_bins),
        ):
            for k, s in theirs.items():
                mine[k] = dh_summary.merge(mine[k], s) if k in mine else s
        self.joint_sums = self.joint_sums + sample.joint_sums
        for area, c in sample.counts.items():
            if area in self.counts and self.counts[area].shape == c.shape:
                self.counts[area] = self.counts[area] + c
            else:
                self.counts[area] = c.copy()
        self._add_points(sample)

    def _add_points(self, sample: TileErrorSample) -> None:
        rows = np.column_stack(
            [sample.priority, sample.x, sample.y, sample.dh, sample.slope_deg, sample.curvature]
        )
        held = self.points.get(sample.crs)
        self.points[sample.crs] = rows if held is None else np.vstack([held, rows])
        if sum(len(p) for p in self.points.values()) > 2 * self.max_points:
            self._trim()

    def _trim(self, *, always: bool = False) -> None:
        """Keep the max_points rows of smallest priority, in the order of priority (ties broken
        by x, y: the same rows in the same order whatever the order the tiles came in); with
        always, order them even when there are no more than max_points."""
        if not always and sum(len(p) for p in self.points.values()) <= self.max_points:
            return
        width = len(POINT_COLUMNS)
        tagged = [
            np.column_stack([p, np.full(len(p), i)]) for i, p in enumerate(self.points.values())
        ]
        every = np.vstack(tagged)
        order = np.lexsort((every[:, 2], every[:, 1], every[:, 0]))[: self.max_points]
        kept = every[order]
        self.points = {
            crs: kept[kept[:, width] == i, :width] for i, crs in enumerate(list(self.points))
        }

    def samples(self) -> NDArray[np.float64]:
        """(x, y, dh, slope, curvature) of the kept samples in one metric CRS (common_metric), in
        an order that does not depend on the order tiles finished in (the variogram takes
        subsets in it)."""
        self._trim(always=True)
        return common_metric(self.points)

    @property
    def pixel_area_m2(self) -> float:
        return float(np.median(self.pixel_areas)) if self.pixel_areas else float("nan")


def common_metric(points: Mapping[str, NDArray[np.float64]]) -> NDArray[np.float64]:
    """Rows (x, y, dh, slope, curvature) with x, y in the first projected CRS among points' keys
    (WKT), or an azimuthal equidistant projection about their centre when all are geographic."""
    if not points:
        return np.zeros((0, len(POINT_COLUMNS) - 1))
    crs_list = sorted(points)
    projected = [c for c in crs_list if not CRS.from_user_input(c).is_geographic]
    out = []
    target: CRS | str
    if projected:
        target = CRS.from_user_input(projected[0])
    else:
        p = points[crs_list[0]]
        lon, lat = (float(np.mean(p[:, 1])), float(np.mean(p[:, 2]))) if len(p) else (0.0, 0.0)
        target = f"+proj=aeqd +lon_0={lon} +lat_0={lat} +datum=WGS84 +units=m"
    for c in crs_list:
        p = points[c]
        x, y = p[:, 1], p[:, 2]
        if not projected or c != projected[0]:
            x, y = Transformer.from_crs(CRS.from_user_input(c), target, always_xy=True).transform(
                x, y
            )
        out.append(np.column_stack([x, y, p[:, 3:]]))
    return np.vstack(out)
