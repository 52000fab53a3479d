"""Spatial correlation of (standardised) dh: empirical variogram from scattered samples, a fit of
a sum of spherical models, and the standard error of an area's mean (pure).

Empirical variogram (Matheron's estimator): for pairs of samples whose distance falls in a bin,
gamma = mean((z_i - z_j)^2) / 2. Bins are log-spaced from ``min_distance_m`` to
``max_distance_m``. Pairs are found with scipy.spatial.cKDTree.query_pairs; to keep memory
bounded whatever the number of samples, each bin uses a seeded random subset of the samples small
enough that about ``target_pairs`` pairs lie within the bin's outer radius (all samples for the
short bins, fewer for the long ones), and at most ``4 x target_pairs`` pairs are kept. A bin
whose subset left samples out takes instead, when they give it more pairs, the pairs among
``4 x target_pairs`` pairs drawn at random from all samples: the pairs of a
small subset share few points and gave long-range sills that changed several-fold with the seed
(measured on the demo), random pairs are nearly independent.

Model: gamma(h) = nugget + sum_k sill_k * sph(h / range_k), sph(u) = 1.5 u - 0.5 u^3 for u < 1,
1 beyond (a spherical covariance, valid in two and three dimensions). Fitted with
scipy.optimize.curve_fit, each bin weighted by its pair count, ranges bounded by the longest
distance sampled (a longer one cannot be estimated: the standard error of areas wider than
``max_distance_m`` may be understated); nugget only, one and two spherical
components are fitted and the one with the smallest Akaike information criterion (on the weighted
residual sum of squares) is kept; a component whose range is below the first bin's distance is
indistinguishable from the nugget and joins it, and one with less than 5 % of the total sill is
dropped (common practice; our thresholds).

Standard error of the mean over an area A of N pixels (Rolstad, Haug & Denby 2009, J. Glaciology
55(192); from memory, integral checked): with L = sqrt(A / pi), each spherical component adds
sill * (1 - L/a + (L/a)^3 / 5) when L < a and sill * (a/L)^2 / 5 when L >= a (the mean covariance
between a disc's centre and the disc), the nugget adds nugget / N. It is exact for a disc much
larger than the range and overestimates the variance when L is near or below the range (about
+20 % in SE at L = a/2).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

#: Components below this share of the total sill are dropped from a fit (on white noise the
#: sampled variogram shows spurious components of about 2 %; a real one this small goes
#: unreported, which understates the SE of large areas).
MIN_SILL_SHARE = 0.05
SPHERICAL = "spherical"


@dataclass(frozen=True)
class EmpiricalVariogram:
    """Per distance bin: edges (metres, n + 1), mean pair distance, gamma and pair count."""

    edges_m: NDArray[np.float64]
    distance_m: NDArray[np.float64]
    gamma: NDArray[np.float64]
    pairs: NDArray[np.int64]

    def to_dict(self) -> dict[str, object]:
        keep = self.pairs > 0
        return {
            "estimator": "Matheron: mean of (z_i - z_j)^2 / 2 per log-spaced distance bin",
            "bin_edges_m": [float(v) for v in self.edges_m],
            "distance_m": [float(v) for v in self.distance_m[keep]],
            "gamma": [float(v) for v in self.gamma[keep]],
            "pairs": [int(v) for v in self.pairs[keep]],
        }


@dataclass(frozen=True)
class Component:
    """One spherical component: range (metres) and partial sill (units of z squared)."""

    range_m: float
    sill: float
    model: str = SPHERICAL


@dataclass(frozen=True)
class VariogramModel:
    """nugget + the spherical components (shortest range first) and the fit's quality."""

    nugget: float
    components: tuple[Component, ...]
    weighted_rms: float = float("nan")
    r_squared: float = float("nan")

    @property
    def total_sill(self) -> float:
        return self.nugget + sum(c.sill for c in self.components)

    def gamma(self, h: NDArray[np.float64]) -> NDArray[np.float64]:
        """The model's semivariance at distances h (metres); 0 at h = 0."""
        h = np.asarray(h, dtype=np.float64)
        out = np.where(h > 0, self.nugget, 0.0)
        for c in self.components:
            out = out + c.sill * spherical(h, c.range_m)
        return out  # type: ignore[no-any-return]

    def to_dict(self) -> dict[str, object]:
        return {
            "nugget": self.nugget,
            "components": [
                {"model": c.model, "range_m": c.range_m, "sill": c.sill} for c in self.components
            ],
            "total_sill": self.total_sill,
            "fit": {
                "weighted_rms_residual": self.weighted_rms,
                "r_squared": self.r_squared,
                "weights": "pair count per bin",
                "selection": "nugget only, one or two spherical components: smallest AIC",
            },
        }


def spherical(h: NDArray[np.float64], range_m: float) -> NDArray[np.float64]:
    """The spherical variogram of unit sill: 1.5 u - 0.5 u^3 for u = h / range < 1, else 1."""
    u = np.minimum(np.asarray(h, dtype=np.float64) / range_m, 1.0)
    return 1.5 * u - 0.5 * u**3  # type: ignore[no-any-return]


def distance_edges(
    min_distance_m: float, max_distance_m: float, n_bins: int
) -> NDArray[np.float64]:
    """Log-spaced bin edges: the first bin is [0, min_distance_m), then n_bins - 1 geometric."""
    if not 0 < min_distance_m < max_distance_m:
        raise ValueError(
            f"need 0 < min_distance_m < max_distance_m, got {min_distance_m}, {max_distance_m}"
        )
    return np.concatenate([[0.0], np.geomspace(min_distance_m, max_distance_m, n_bins)])


def empirical_variogram(
    x: NDArray[np.float64],
    y: NDArray[np.float64],
    z: NDArray[np.float64],
    *,
    min_distance_m: float,
    max_distance_m: float,
    n_bins: int = 24,
    seed: int = 0,
    target_pairs: int = 200_000,
) -> EmpiricalVariogram:
    """Matheron's variogram of z at points (x, y) (metres), bounded in memory (see module)."""
    x, y, z = (np.asarray(a, dtype=np.float64) for a in (x, y, z))
    keep = np.isfinite(x) & np.isfinite(y) & np.isfinite(z)
    x, y, z = x[keep], y[keep], z[keep]
    edges = distance_edges(min_distance_m, max_distance_m, n_bins)
    n = len(edges) - 1
    gamma, dist, pairs = np.zeros(n), np.zeros(n), np.zeros(n, dtype=np.int64)
    if x.size < 2:
        return EmpiricalVariogram(edges, dist, gamma, pairs)
    rng = np.random.default_rng(seed)
    order = rng.permutation(x.size)
    area = max((np.ptp(x) + min_distance_m) * (np.ptp(y) + min_distance_m), 1.0)
    points = (x, y, z)
    sampled = np.zeros(n, dtype=np.int64)  # points of each bin's subset
    for k in range(n):
        m = int(np.sqrt(2.0 * target_pairs * area / (np.pi * edges[k + 1] ** 2)))
        chosen = order[: max(2, min(x.size, m))]
        sampled[k] = chosen.size
        pairs[k], gamma[k], dist[k] = _subset_bin(
            points, chosen, edges[k], edges[k + 1], rng, 4 * target_pairs
        )
    r_pairs, r_gamma, r_dist = _random_pairs(points, edges, rng, 4 * target_pairs)
    use = (sampled < x.size) & (r_pairs > pairs)
    pairs, gamma, dist = (
        np.where(use, r, s) for r, s in ((r_pairs, pairs), (r_gamma, gamma), (r_dist, dist))
    )
    return EmpiricalVariogram(edges, dist, gamma, pairs)


def _subset_bin(
    points: tuple[NDArray[np.float64], ...],
    chosen: NDArray[np.intp],
    low: float,
    high: float,
    rng: np.random.Generator,
    most: int,
) -> tuple[int, float, float]:
    """Pairs, gamma and mean distance of the bin [low, high) among the chosen points' pairs
    (at most ``most`` pairs within high, drawn at random)."""
    from scipy.spatial import cKDTree  # here: its import is left to jobs with an error model

    x, y, z = points
    tree = cKDTree(np.column_stack([x[chosen], y[chosen]]))
    found = tree.query_pairs(high, output_type="ndarray")
    if len(found) > most:
        found = found[rng.choice(len(found), most, replace=False)]
    i, j = chosen[found[:, 0]], chosen[found[:, 1]]
    d = np.hypot(x[i] - x[j], y[i] - y[j])
    inside = (d >= low) & (d < high)
    if not inside.any():
        return 0, 0.0, 0.0
    diff = z[i[inside]] - z[j[inside]]
    return int(inside.sum()), 0.5 * float(np.mean(diff * diff)), float(d[inside].mean())


def _random_pairs(
    points: tuple[NDArray[np.float64], ...],
    edges: NDArray[np.float64],
    rng: np.random.Generator,
    count: int,
) -> tuple[NDArray[np.int64], NDArray[np.float64], NDArray[np.float64]]:
    """Per bin: pairs, gamma and mean distance of ``count`` pairs of distinct points drawn at
    random among all points (nearly independent pairs: for the long bins, where a subset small
    enough for a tree query makes every pair share few points)."""
    x, y, z = points
    n = len(edges) - 1
    i, j = rng.integers(0, x.size, count), rng.integers(0, x.size, count)
    i, j = i[i != j], j[i != j]
    d = np.hypot(x[i] - x[j], y[i] - y[j])
    k = np.searchsorted(edges, d, side="right") - 1
    on = (k >= 0) & (k < n)
    k, d, diff = k[on], d[on], (z[i] - z[j])[on]
    found = np.bincount(k, minlength=n).astype(np.int64)
    with np.errstate(invalid="ignore", divide="ignore"):
        gamma = 0.5 * np.bincount(k, weights=diff * diff, minlength=n) / found
        dist = np.bincount(k, weights=d, minlength=n) / found
    return found, np.nan_to_num(gamma), np.nan_to_num(dist)


def fit_variogram(v: EmpiricalVariogram, *, max_components: int = 2) -> VariogramModel:
    """Fit nugget + up to max_components spherical models (see module); the nugget-only model
    when fewer than 4 bins hold pairs."""
    keep = v.pairs > 0
    h, g, w = v.distance_m[keep], v.gamma[keep], v.pairs[keep].astype(np.float64)
    if h.size == 0:
        return VariogramModel(float("nan"), ())
    candidates = [_nugget_only(g, w)]
    if h.size >= 4:
        for n_comp in range(1, max_components + 1):
            if h.size > 2 * n_comp + 1:
                fitted = _fit_spherical(h, g, w, n_comp)
                if fitted is not None:
                    candidates.append(fitted)
    best = min(candidates, key=lambda m: _aic(m, h, g, w))
    return _with_quality(_simplified(best, first_distance=float(h[0])), h, g, w)


def _nugget_only(g: NDArray[np.float64], w: NDArray[np.float64]) -> VariogramModel:
    return VariogramModel(float(np.average(g, weights=w)), ())


def _fit_spherical(
    h: NDArray[np.float64], g: NDArray[np.float64], w: NDArray[np.float64], n_comp: int
) -> VariogramModel | None:
    from scipy.optimize import curve_fit  # here: its import is left to jobs that fit

    def model(d: NDArray[np.float64], *p: float) -> NDArray[np.float64]:
        out = np.full(d.shape, p[0])
        for k in range(n_comp):
            out = out + p[1 + 2 * k] * spherical(d, p[2 + 2 * k])
        return out

    top = float(max(g.max(), 1e-12))
    h_max = float(h.max())
    reach = float(h[np.argmax(g >= 0.9 * g.max())])
    guesses = [reach] if n_comp == 1 else [max(reach / 4, h[0]), min(2 * reach, h_max)]
    p0: list[float] = [float(max(g[0] * 0.5, 0.0))]
    low: list[float] = [0.0]
    high: list[float] = [2 * top]
    for a in guesses:
        p0 += [top / n_comp, float(np.clip(a, h[0], h_max))]
        low += [0.0, float(h[0]) * 0.1]
        high += [2 * top, h_max]
    p0 = list(np.clip(p0, np.array(low) + 1e-12, np.array(high) - 1e-12))
    try:
        p, _ = curve_fit(
            model, h, g, p0=p0, sigma=1 / np.sqrt(w), bounds=(low, high), maxfev=20_000
        )
    except (RuntimeError, ValueError):
        return None
    comps = sorted(
        (Component(float(p[2 + 2 * k]), float(p[1 + 2 * k])) for k in range(n_comp)),
        key=lambda c: c.range_m,
    )
    return VariogramModel(float(p[0]), tuple(comps))


def _aic(
    m: VariogramModel, h: NDArray[np.float64], g: NDArray[np.float64], w: NDArray[np.float64]
) -> float:
    rss = float(np.sum(w * (g - m.gamma(h)) ** 2) / w.sum())
    k = 1 + 2 * len(m.components)
    return h.size * np.log(max(rss, 1e-300)) + 2 * k


def _simplified(m: VariogramModel, *, first_distance: float) -> VariogramModel:
    """Components shorter than the first bin join the nugget; tiny ones are dropped."""
    nugget = m.nugget
    kept = []
    total = m.total_sill
    for c in m.components:
        if c.range_m < first_distance:
            nugget += c.sill
        elif total > 0 and c.sill >= MIN_SILL_SHARE * total:
            kept.append(c)
    return VariogramModel(nugget, tuple(kept))


def _with_quality(
    m: VariogramModel, h: NDArray[np.float64], g: NDArray[np.float64], w: NDArray[np.float64]
) -> VariogramModel:
    resid = g - m.gamma(h)
    rms = float(np.sqrt(np.sum(w * resid**2) / w.sum()))
    mean = np.average(g, weights=w)
    total = float(np.sum(w * (g - mean) ** 2))
    r2 = 1.0 - float(np.sum(w * resid**2)) / total if total > 0 else float("nan")
    return VariogramModel(m.nugget, m.components, rms, r2)


def rolstad_factor(l_m: float, range_m: float) -> float:
    """Mean correlation of a disc of radius L with its centre, for a spherical model of unit
    sill and range a (Rolstad et al. 2009): 1 - L/a + (L/a)^3/5 for L < a, (a/L)^2/5 beyond."""
    if l_m <= 0:
        return 1.0
    u = l_m / range_m
    if u < 1:
        return 1.0 - u + u**3 / 5.0
    return 1.0 / (5.0 * u * u)


def mean_variance(model: VariogramModel, *, n: int, area_m2: float) -> float:
    """Variance of the mean of n values of unit-scaled z over an area (m^2), from the model
    (Rolstad et al. 2009 per spherical component, plus nugget / n)."""
    if n <= 0:
        return float("nan")
    radius = float(np.sqrt(area_m2 / np.pi))
    correlated = sum(c.sill * rolstad_factor(radius, c.range_m) for c in model.components)
    return model.nugget / n + correlated
