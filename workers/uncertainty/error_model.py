"""Error model of dh on stable terrain: spread by slope, spatial correlation, standard errors of
regional figures (pure, apart from pyproj for coordinates).

One pass over the tiles, bounded memory, reproducible from the spec's seed:

* per tile (:func:`tile_error_sample`, on the workers): stable terrain is the valid pixels of a
  non-vegetated land-cover class (every pixel when the job has no land cover), with a finite
  slope, within the tile's own outlier limits (the spec's rule and factor applied to the tile's
  stable pixels: median +- factor x NMAD, or +- factor x RMSE; a tile-level limit, so one pass
  suffices). Their dh is summarised per fine slope bin (2 degrees up to 70, then 70-90) and per
  bin of absolute total curvature, as mergeable :class:`~demaudit.workers.stats.summary.DhSummary`
  (so NMAD per
  bin comes out of the merge exactly as for regions); a seeded random sample of at most
  ``samples_per_tile`` stable pixels keeps (x, y, dh, slope) and a random priority; and every
  valid pixel is counted per area x land-cover class x 1-degree slope bin (to weight sigma^2
  over regions and strata later).
* on the client (:class:`ErrorModelAccumulator`): the summaries merge, the counts add, and the
  samples with the smallest priorities are kept (at most ``max_points``: the same set whatever
  the order tiles finish in, and memory flat with archive size).
* :func:`fit_error_model`: sigma_dh(slope) = a + b * tan(slope)^c fitted to the binned NMADs
  (weighted by sqrt(count); heteroscedasticity as in Hugonnet et al. 2022, IEEE JSTARS 15, from
  memory; the form is our choice), dh standardised by it, the empirical variogram and its
  spherical fit (workers/uncertainty/variogram.py).
* :func:`area_uncertainty`: the standard error of an area's mean dh (Rolstad, Haug & Denby 2009,
  see workers/uncertainty/variogram.py) scaled by the area's mean sigma_dh^2, and of its median as
  sqrt(pi/2) x that (an approximation for normal errors).

Curvature here is the Laplacian z_xx + z_yy of the reference (second central differences, 1/m),
binned as |curvature| x 100; it is reported binned but not modelled.
"""

from __future__ import annotations

import zlib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray
from pyproj import CRS, Transformer
from scipy.optimize import curve_fit

from demaudit.workers.stats import summary as dh_summary
from demaudit.workers.stats.summary import DhSummary
from demaudit.workers.tile.grid import Grid
from demaudit.workers.tile.keyed_summary import summarise_cells
from demaudit.workers.tile.strata import EXCLUDED_CODE, ClassInfo, class_codes, stratum_cells
from demaudit.workers.tile.terrain import slope_degrees
from demaudit.workers.uncertainty.variogram import (
    EmpiricalVariogram,
    VariogramModel,
    empirical_variogram,
    fit_variogram,
    mean_variance,
)

SLOPE_EDGES_DEG = (*range(0, 72, 2), 90)  # 2-degree bins up to 70, then 70-90
CURVATURE_EDGES = (0.0, 0.1, 0.25, 0.5, 1.0, 2.0, 5.0)  # |Laplacian| x 100 (1/m); last open
DEGREE_BINS = 91  # 1-degree slope bins 0..89, and 90 for no slope (edge or NaN)
MIN_BIN_COUNT = 100  # slope bins with fewer stable pixels are not fitted
MEDIAN_SE_FACTOR = float(np.sqrt(np.pi / 2))  # SE(median) / SE(mean) for normal errors
NMAD_SE_FACTOR = 1.1664  # SE(NMAD) x sqrt(n) / sigma for normal errors (asymptotic; from memory)
NON_VEGETATED = "non_vegetated"


@dataclass(frozen=True)
class ErrorModelOptions:
    """What a worker needs to sample the error model (from the spec's ``error_model`` and
    ``outliers`` sections)."""

    seed: int = 0
    samples_per_tile: int = 2000
    outlier_rule: str = "nmad"
    outlier_factor: float = 5.0


@dataclass(frozen=True, eq=False)
class TileErrorSample:
    """One tile's contribution (see module). Coordinates are in ``crs`` (WKT)."""

    crs: str
    pixel_area_m2: float
    slope_bins: dict[int, DhSummary]
    curvature_bins: dict[int, DhSummary]
    x: NDArray[np.float64]
    y: NDArray[np.float64]
    dh: NDArray[np.float64]
    slope_deg: NDArray[np.float64]
    priority: NDArray[np.float64]
    counts: dict[str, NDArray[np.int64]]  # area -> (class code, 1-degree slope bin) counts
    stable: int = 0
    outside_limits: int = 0


def laplacian(heights: NDArray[np.floating], *, px: float, py: float) -> NDArray[np.float64]:
    """z_xx + z_yy by second central differences (1/m); NaN on the outer ring."""
    z = np.asarray(heights, dtype=np.float64)
    out = np.full(z.shape, np.nan)
    if min(z.shape) < 3:
        return out
    out[1:-1, 1:-1] = (z[1:-1, 2:] - 2 * z[1:-1, 1:-1] + z[1:-1, :-2]) / (px * px) + (
        z[2:, 1:-1] - 2 * z[1:-1, 1:-1] + z[:-2, 1:-1]
    ) / (py * py)
    return out


def laplacian_at(
    heights: NDArray[np.floating], flat: NDArray[np.intp], *, px: float, py: float
) -> NDArray[np.float64]:
    """laplacian(heights) at the flat indices only (NaN on the outer ring)."""
    z = np.asarray(heights).ravel()
    rows, cols = heights.shape
    r, c = np.divmod(flat, cols)
    inner = (r > 0) & (r < rows - 1) & (c > 0) & (c < cols - 1)
    i = flat[inner]
    centre = 2.0 * z[i].astype(np.float64)
    out = np.full(flat.shape, np.nan)
    out[inner] = (z[i + 1] - centre + z[i - 1]) / (px * px) + (
        z[i + cols] - centre + z[i - cols]
    ) / (py * py)
    return out


def tile_error_sample(
    dh: NDArray[np.floating],
    *,
    reference: NDArray[np.floating],
    landcover: NDArray[np.floating] | None,
    classes: Sequence[ClassInfo],
    region_masks: Mapping[str, NDArray[np.bool_]],
    pixel_centres: Any,
    crs: str,
    pixel_size_m: tuple[float, float],
    tile_id: str,
    options: ErrorModelOptions,
) -> TileErrorSample:
    """A tile's error-model contribution (see module). dh and reference in metres on the tile's
    grid (NaN = none); ``pixel_centres(rows, cols)`` gives map coordinates in ``crs``."""
    px, py = pixel_size_m
    slope = slope_degrees(np.asarray(reference, np.float64), pixel_size_x_m=px, pixel_size_y_m=py)
    codes = class_codes(landcover, classes, size=dh.size).reshape(dh.shape)
    valid = np.isfinite(dh) & (codes != EXCLUDED_CODE)
    degree = np.where(np.isfinite(slope), np.clip(np.floor(slope), 0, 89), 90).astype(np.intp)
    n_codes = len([c for c in classes if c.group != "excluded"]) + 1
    cell = codes.astype(np.intp) * DEGREE_BINS + degree
    counts = {
        area: np.bincount(cell[valid & mask], minlength=n_codes * DEGREE_BINS)
        .reshape(n_codes, DEGREE_BINS)
        .astype(np.int64)
        for area, mask in {"*": np.ones(dh.shape, bool), **region_masks}.items()
    }
    stable = valid & np.isfinite(slope)
    if landcover is not None:
        kept = [c for c in classes if c.group != "excluded"]
        open_codes = [k for k, c in enumerate(kept) if c.group == NON_VEGETATED]
        is_open = np.zeros(256, dtype=bool)
        is_open[open_codes] = True
        stable &= is_open[codes]
    (flat,) = np.nonzero(stable.ravel())
    values = np.asarray(dh, np.float64).ravel()[flat]
    inside = _within_limits(values, rule=options.outlier_rule, factor=options.outlier_factor)
    flat, values = flat[inside], values[inside]
    slope_flat = slope.ravel()[flat]
    slope_key = np.clip(
        np.searchsorted(SLOPE_EDGES_DEG, slope_flat, side="right") - 1, 0, len(SLOPE_EDGES_DEG) - 2
    )
    curv = np.abs(laplacian_at(reference, flat, px=px, py=py)) * 100
    curv_key = np.where(
        np.isfinite(curv), np.searchsorted(CURVATURE_EDGES, curv, side="right") - 1, -1
    )
    slope_bins = _binned(values, slope_key, len(SLOPE_EDGES_DEG) - 1)
    curvature_bins = _binned(values, curv_key, len(CURVATURE_EDGES))
    rng = np.random.default_rng([options.seed, zlib.crc32(tile_id.encode())])
    take = min(options.samples_per_tile, flat.size)
    pick = np.sort(rng.choice(flat.size, size=take, replace=False)) if take else np.zeros(0, int)
    rows, cols = np.divmod(flat[pick], dh.shape[1])
    x, y = pixel_centres(rows.astype(np.float64), cols.astype(np.float64))
    return TileErrorSample(
        crs=crs,
        pixel_area_m2=float(px * py),
        slope_bins=slope_bins,
        curvature_bins=curvature_bins,
        x=np.asarray(x, np.float64),
        y=np.asarray(y, np.float64),
        dh=values[pick],
        slope_deg=slope_flat[pick],
        priority=rng.random(take),
        counts=counts,
        stable=int(flat.size),
        outside_limits=int((~inside).sum()),
    )


def _within_limits(values: NDArray[np.float64], *, rule: str, factor: float) -> NDArray[np.bool_]:
    if values.size == 0:
        return np.zeros(0, bool)
    if rule == "rmse":
        half = factor * float(np.sqrt(np.mean(values * values)))
        return np.abs(values) <= half  # type: ignore[no-any-return]
    median = float(np.median(values))
    nmad = dh_summary.NMAD_FACTOR * float(np.median(np.abs(values - median)))
    return np.abs(values - median) <= factor * nmad  # type: ignore[no-any-return]


def _binned(values: NDArray[np.float64], keys: NDArray[np.integer], n: int) -> dict[int, DhSummary]:
    cells = summarise_cells(values, np.asarray(keys, dtype=np.intp), n)
    return {k: cells.union([k]) for k in range(n) if cells.count[k]}


@dataclass
class ErrorModelAccumulator:
    """The running merge of tile samples on the client (bounded: see module)."""

    max_points: int = 100_000
    slope_bins: dict[int, DhSummary] = field(default_factory=dict)
    curvature_bins: dict[int, DhSummary] = field(default_factory=dict)
    counts: dict[str, NDArray[np.int64]] = field(default_factory=dict)
    points: dict[str, NDArray[np.float64]] = field(default_factory=dict)  # crs -> (k, 5)
    pixel_areas: list[float] = field(default_factory=list)
    tiles: int = 0
    stable: int = 0
    outside_limits: int = 0

    def add(self, sample: TileErrorSample | None) -> None:
        if sample is None:
            return
        self.tiles += 1
        self.stable += sample.stable
        self.outside_limits += sample.outside_limits
        self.pixel_areas.append(sample.pixel_area_m2)
        for mine, theirs in (
            (self.slope_bins, sample.slope_bins),
            (self.curvature_bins, sample.curvature_bins),
        ):
            for k, s in theirs.items():
                mine[k] = dh_summary.merge(mine[k], s) if k in mine else s
        for area, c in sample.counts.items():
            if area in self.counts and self.counts[area].shape == c.shape:
                self.counts[area] = self.counts[area] + c
            else:
                self.counts[area] = c.copy()
        rows = np.column_stack([sample.priority, sample.x, sample.y, sample.dh, sample.slope_deg])
        held = self.points.get(sample.crs)
        self.points[sample.crs] = rows if held is None else np.vstack([held, rows])
        if sum(len(p) for p in self.points.values()) > 2 * self.max_points:
            self._trim()

    def _trim(self) -> None:
        """Keep the max_points rows of smallest priority (ties broken by x, y: the same rows
        whatever the order the tiles came in)."""
        if sum(len(p) for p in self.points.values()) <= self.max_points:
            return
        tagged = [
            np.column_stack([p, np.full(len(p), i)]) for i, p in enumerate(self.points.values())
        ]
        every = np.vstack(tagged)
        order = np.lexsort((every[:, 2], every[:, 1], every[:, 0]))[: self.max_points]
        kept = every[order]
        self.points = {
            crs: kept[kept[:, 5] == i, :5] for i, crs in enumerate(list(self.points))
        }

    def samples(self) -> NDArray[np.float64]:
        """(x, y, dh, slope) of the kept samples in one metric CRS (see common_metric)."""
        self._trim()
        return common_metric(self.points)

    @property
    def pixel_area_m2(self) -> float:
        return float(np.median(self.pixel_areas)) if self.pixel_areas else float("nan")


def common_metric(points: Mapping[str, NDArray[np.float64]]) -> NDArray[np.float64]:
    """Rows (x, y, dh, slope) with x, y in the first projected CRS among points' keys (WKT), or
    an azimuthal equidistant projection about their centre when all are geographic."""
    if not points:
        return np.zeros((0, 4))
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
        out.append(np.column_stack([x, y, p[:, 3], p[:, 4]]))
    return np.vstack(out)


@dataclass(frozen=True)
class SigmaModel:
    """sigma_dh(slope) = a + b * tan(slope)^c (metres)."""

    a: float
    b: float
    c: float

    def __call__(self, slope_deg: NDArray[np.float64] | float) -> NDArray[np.float64]:
        t = np.tan(np.radians(np.clip(slope_deg, 0.0, 89.0)))
        return self.a + self.b * t**self.c  # type: ignore[no-any-return]


def fit_sigma(
    centres_deg: NDArray[np.float64], nmad: NDArray[np.float64], counts: NDArray[np.float64]
) -> SigmaModel:
    """Fit a + b * tan(slope)^c (a, b >= 0, 0.5 <= c <= 3) to binned NMADs, weights sqrt(count);
    with fewer than 3 bins, a constant (the count-weighted mean NMAD)."""
    t = np.tan(np.radians(centres_deg))
    constant = SigmaModel(float(np.average(nmad, weights=counts)), 0.0, 1.0)
    if len(t) < 3:
        return constant
    try:
        p, _ = curve_fit(
            lambda s, a, b, c: a + b * s**c,
            t,
            nmad,
            p0=[float(nmad.min()), float(max(nmad.max() - nmad.min(), 1e-6)), 1.0],
            sigma=1 / np.sqrt(counts),
            bounds=([0.0, 0.0, 0.5], [np.inf, np.inf, 3.0]),
            maxfev=10_000,
        )
    except (RuntimeError, ValueError):
        return constant
    return SigmaModel(float(p[0]), float(p[1]), float(p[2]))


@dataclass(frozen=True)
class FittedErrorModel:
    """The fitted model and what it was fitted on."""

    sigma: SigmaModel
    variogram: VariogramModel
    empirical: EmpiricalVariogram
    sigma_table: list[dict[str, Any]]
    curvature_table: list[dict[str, Any]]
    samples: int
    tiles: int
    stable: int
    outside_limits: int
    max_distance_m: float
    seed: int
    pixel_area_m2: float

    def document(self) -> dict[str, Any]:
        """The summary.json ``error_model`` section."""
        v = self.variogram.to_dict()
        return {
            "stable_terrain": "valid pixels of non-vegetated classes (all without land cover), "
            "within each tile's outlier limits (the spec's rule and factor on the tile's stable "
            "pixels)",
            "stable_pixels": self.stable,
            "outside_limits": self.outside_limits,
            "tiles": self.tiles,
            "samples": self.samples,
            "seed": self.seed,
            "max_distance_m": self.max_distance_m,
            "sigma_by_slope": {
                "model": "sigma_dh = a + b * tan(slope)^c, fitted to the NMAD of stable dh per "
                "slope bin (weights sqrt(count); bins under 100 pixels left out)",
                "a_m": self.sigma.a,
                "b_m": self.sigma.b,
                "c": self.sigma.c,
                "bins": self.sigma_table,
            },
            "nmad_by_curvature": {
                "curvature": "|z_xx + z_yy| x 100 of the reference (1/m), not modelled",
                "bins": self.curvature_table,
            },
            "standardised": "z = (dh - median of stable dh) / sigma_dh(slope)",
            "components": v["components"],
            "nugget": v["nugget"],
            "total_sill": v["total_sill"],
            "fit": v["fit"],
            "empirical_variogram": self.empirical.to_dict(),
        }


def fit_error_model(
    acc: ErrorModelAccumulator, *, max_distance_m: float, seed: int
) -> FittedErrorModel:
    """Fit sigma(slope) on the merged bins, standardise the samples, fit the variogram."""
    sigma_table = _bin_table(acc.slope_bins, SLOPE_EDGES_DEG)
    usable = [r for r in sigma_table if r["count"] >= MIN_BIN_COUNT]
    if usable:
        sigma = fit_sigma(
            np.array([r["centre_deg"] for r in usable]),
            np.array([r["nmad"] for r in usable]),
            np.array([r["count"] for r in usable], dtype=np.float64),
        )
    else:
        sigma = SigmaModel(float("nan"), 0.0, 1.0)
    for r in sigma_table:
        r["model_m"] = float(sigma(r["centre_deg"]))
    curvature_table = _bin_table(acc.curvature_bins, (*CURVATURE_EDGES, float("inf")))
    pts = acc.samples()
    centre = float(np.median(pts[:, 2])) if len(pts) else 0.0
    z = (pts[:, 2] - centre) / sigma(pts[:, 3]) if len(pts) else np.zeros(0)
    step = float(np.sqrt(acc.pixel_area_m2)) if acc.pixel_areas else 1.0
    empirical = empirical_variogram(
        pts[:, 0],
        pts[:, 1],
        z,
        min_distance_m=min(step * 1.5, max_distance_m / 2),
        max_distance_m=max_distance_m,
        seed=seed,
    )
    return FittedErrorModel(
        sigma=sigma,
        variogram=fit_variogram(empirical),
        empirical=empirical,
        sigma_table=sigma_table,
        curvature_table=curvature_table,
        samples=len(pts),
        tiles=acc.tiles,
        stable=acc.stable,
        outside_limits=acc.outside_limits,
        max_distance_m=max_distance_m,
        seed=seed,
        pixel_area_m2=acc.pixel_area_m2,
    )


def _bin_table(bins: Mapping[int, DhSummary], edges: Sequence[float]) -> list[dict[str, Any]]:
    rows = []
    for k in sorted(bins):
        stats = dh_summary.statistics(bins[k])
        lo, hi = float(edges[k]), float(edges[k + 1])
        centre = 0.5 * (lo + hi) if np.isfinite(hi) else lo
        rows.append(
            {
                "low": lo,
                "high": hi,
                "centre_deg": centre,
                "count": int(stats["count"] or 0),
                "median": stats["median"],
                "nmad": stats["nmad"],
            }
        )
    return rows


def mean_sigma2(counts: NDArray[np.int64], sigma: SigmaModel) -> tuple[float, int]:
    """Count-weighted mean sigma_dh^2 over a (class code, 1-degree bin) count table (pixels with
    no slope take the flat-ground sigma), and the number of pixels."""
    per_degree = counts.sum(axis=0) if counts.ndim == 2 else counts
    n = int(per_degree.sum())
    if n == 0:
        return float("nan"), 0
    centres = np.r_[np.arange(90) + 0.5, 0.0]
    s2 = np.asarray(sigma(centres)) ** 2
    return float(np.sum(per_degree * s2) / n), n


def area_uncertainty(
    model: FittedErrorModel, counts: NDArray[np.int64] | None, *, n_pixels: int
) -> dict[str, Any]:
    """``uncertainty`` of one area: standard errors of its mean and median dh (see module)."""
    if counts is None or n_pixels <= 0 or not np.isfinite(model.variogram.nugget):
        return {"mean_se_m": None, "median_se_m": None, "method": "not available"}
    s2, n = mean_sigma2(counts, model.sigma)
    if n == 0 or not np.isfinite(s2):
        return {"mean_se_m": None, "median_se_m": None, "method": "not available"}
    area = n * model.pixel_area_m2
    variance = s2 * mean_variance(model.variogram, n=n, area_m2=area)
    se = float(np.sqrt(variance))
    n_eff = s2 / variance if variance > 0 else float(n)
    return {
        "mean_se_m": se,
        "median_se_m": MEDIAN_SE_FACTOR * se,
        "nmad_se_m": NMAD_SE_FACTOR * float(np.sqrt(s2)) / float(np.sqrt(max(n_eff, 1.0))),
        "effective_pixels": n_eff,
        "area_km2": area / 1e6,
        "mean_sigma_m": float(np.sqrt(s2)),
        "independent_pixels_mean_se_m": float(np.sqrt(s2 / n)),
        "method": METHOD,
    }


METHOD = (
    "Rolstad, Haug & Denby (2009): the fitted spherical components averaged over a disc of the "
    "area's size (L = sqrt(A/pi)) plus nugget/N, times the area's mean sigma_dh(slope)^2; a "
    "scattered area or stratum is treated as one compact area (conservative). sigma_dh and the "
    "correlation are those of stable terrain: where vegetation or roofs add spread (and their "
    "own correlation) the true standard error is larger. median_se_m = "
    "sqrt(pi/2) x mean_se_m and nmad_se_m = 1.166 x sigma / sqrt(effective_pixels): "
    "approximations for normal errors."
)


def stratum_counts(
    counts: NDArray[np.int64],
    *,
    with_landcover: bool,
    classes: Sequence[ClassInfo],
    slope_edges: Sequence[float],
) -> dict[str, NDArray[np.int64]]:
    """Each stratum's (1-degree slope bin) counts from an area's (class code, degree) table,
    the strata being those of workers/tile/strata.py (a degree bin counts in the slope band holding
    its lower edge: exact for whole-degree band edges)."""
    layout = stratum_cells(with_landcover=with_landcover, classes=classes, slope_edges=slope_edges)
    edges = np.asarray(slope_edges, dtype=np.float64)
    band_of_degree = np.r_[np.searchsorted(edges, np.arange(90), side="right") - 1, layout.n_bands]
    band_of_degree[band_of_degree < 0] = layout.n_bands
    out = {}
    for name, cells in layout.strata.items():
        total = np.zeros(DEGREE_BINS, dtype=np.int64)
        for cell in cells:
            code, band = divmod(cell, layout.n_bands + 1)
            if code < counts.shape[0]:
                total += np.where(band_of_degree == band, counts[code], 0)
        out[name] = total
    return out


def grid_error_sample(
    grid: Grid,
    tile_id: str,
    dh: NDArray[np.floating],
    reference: NDArray[np.floating],
    landcover: NDArray[np.floating] | None,
    region_masks: Mapping[str, NDArray[np.bool_]],
    classes: Sequence[ClassInfo],
    options: ErrorModelOptions | None,
) -> TileErrorSample | None:
    """tile_error_sample on a tile's grid (None when the job has no error model)."""
    if options is None:
        return None
    return tile_error_sample(
        dh,
        reference=reference,
        landcover=landcover,
        classes=classes,
        region_masks=region_masks,
        pixel_centres=grid.pixel_centres,
        crs=grid.crs,
        pixel_size_m=grid.pixel_size_m(),
        tile_id=tile_id,
        options=options,
    )


def with_uncertainty(
    entry: dict[str, Any],
    model: FittedErrorModel,
    counts: NDArray[np.int64] | None,
    *,
    with_landcover: bool,
    classes: Sequence[ClassInfo],
    slope_edges: Sequence[float],
) -> dict[str, Any]:
    """An area entry of workers/outputs/summary_document.py (stats, confidence_95, strata) with
    ``uncertainty``
    for the area and each stratum; its order-statistic intervals labelled 'independent pixels'."""
    out = dict(entry)
    out["uncertainty"] = _interval(
        area_uncertainty(model, counts, n_pixels=int(entry["stats"].get("count") or 0)),
        entry["stats"],
    )
    if "confidence_95" in out:
        out["confidence_95"] = dict(out["confidence_95"]) | {"label": "independent pixels"}
    per_stratum = (
        stratum_counts(
            counts, with_landcover=with_landcover, classes=classes, slope_edges=slope_edges
        )
        if counts is not None
        else {}
    )
    out["strata"] = [
        s
        | {
            "uncertainty": _interval(
                area_uncertainty(
                    model, per_stratum.get(s["stratum"]), n_pixels=int(s["stats"].get("count") or 0)
                ),
                s["stats"],
            )
        }
        for s in entry.get("strata", [])
    ]
    return out


def _interval(u: dict[str, Any], stats: Mapping[str, Any]) -> dict[str, Any]:
    """u with 95 % intervals of the mean and median (value +- 1.96 SE)."""
    for key, se_key in (("mean", "mean_se_m"), ("median", "median_se_m")):
        value, se = stats.get(key), u.get(se_key)
        if value is not None and se is not None:
            u[f"{key}_95_m"] = [value - 1.959964 * se, value + 1.959964 * se]
    return u


def attach_error_model(
    errors: ErrorModelAccumulator,
    *,
    max_distance_m: float,
    seed: int,
    overall: dict[str, Any],
    regions: list[dict[str, Any]],
    with_landcover: bool,
    classes: Sequence[ClassInfo],
    slope_edges: Sequence[float],
) -> tuple[dict[str, Any], dict[str, Any], list[dict[str, Any]]]:
    """Fit the model and give the summary.json section, the overall entry and the region
    entries with their ``uncertainty`` (see with_uncertainty)."""
    model = fit_error_model(errors, max_distance_m=max_distance_m, seed=seed)
    layout: dict[str, Any] = {
        "with_landcover": with_landcover,
        "classes": classes,
        "slope_edges": slope_edges,
    }
    overall = with_uncertainty(overall, model, errors.counts.get("*"), **layout)
    regions = [
        with_uncertainty(r, model, errors.counts.get(r["region"]), **layout) for r in regions
    ]
    return model.document(), overall, regions
