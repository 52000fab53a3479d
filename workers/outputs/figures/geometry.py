"""Where things go on the map figures, without matplotlib (pure): the scale bar (in metres, also
on longitude/latitude maps), the job's outline in longitude/latitude for the inset, the map's
axis labels, and the corners of tile rectangles."""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from functools import lru_cache
from typing import Any

import numpy as np
from numpy.typing import NDArray

Bounds = tuple[float, float, float, float]


@dataclass(frozen=True)
class MapFrame:
    """What the map's CRS means for drawing: geographic (degrees) or projected, the metres in
    one horizontal map unit at the map's centre, and the axis labels."""

    geographic: bool
    metres_per_unit: float | None
    x_label: str
    y_label: str
    centre_lat: float | None = None
    parallel_scale: float = 1.0

    @property
    def aspect(self) -> float:
        """Height/width of one map unit on screen: 1 for projected maps, 1/cos(latitude) for
        longitude/latitude maps (a degree of longitude is shorter than one of latitude)."""
        if not self.geographic or self.centre_lat is None:
            return 1.0
        return 1.0 / max(math.cos(math.radians(self.centre_lat)), 0.01)


@dataclass(frozen=True)
class ScaleBar:
    """A scale bar: its length in metres, the same in map units, and its label."""

    length_m: float
    length_units: float
    label: str


@lru_cache(maxsize=64)
def map_frame(crs: str | None, extent: Bounds) -> MapFrame:
    """The frame of a map with this extent in crs (None: unknown units, no scale bar). On a
    projected map, the metres per map unit are those on the ground at the map's centre: the
    unit's length divided by the projection's scale along the parallel there (PROJ's factors;
    1.0004 for UTM on its central meridian, sec(latitude) for Web Mercator)."""
    if crs is None:
        return MapFrame(False, None, "x", "y")
    from pyproj import CRS

    c = CRS.from_user_input(crs)
    if c.is_geographic:
        lat = (extent[1] + extent[3]) / 2
        return MapFrame(True, metres_per_degree_lon(lat, crs), "longitude (°)", "latitude (°)", lat)
    if not c.is_projected:
        return MapFrame(False, None, "x", "y")
    unit = c.axis_info[0]
    name = (unit.unit_name or "").lower()
    short = "m" if name in ("metre", "meter") else name or "map units"
    factor = float(unit.unit_conversion_factor or 0.0)
    scale, centre_lat = _parallel_scale(c, extent)
    per_unit = factor / scale if factor > 0 else None
    labels = f"easting ({short})", f"northing ({short})"
    return MapFrame(False, per_unit, *labels, centre_lat, scale)


def _parallel_scale(crs: Any, extent: Bounds) -> tuple[float, float | None]:
    """The projection's scale factor along the parallel at the extent's centre, and the
    centre's latitude (1.0 and None when PROJ cannot say)."""
    from pyproj import Proj, Transformer

    x, y = (extent[0] + extent[2]) / 2, (extent[1] + extent[3]) / 2
    try:
        lon, lat = Transformer.from_crs(crs, "EPSG:4326", always_xy=True).transform(x, y)
        scale = float(Proj(crs).get_factors(lon, lat).parallel_scale)
    except Exception:  # noqa: BLE001 - any PROJ failure: no correction, said by the None
        return 1.0, None
    if not math.isfinite(scale) or scale <= 0:
        return 1.0, None
    return scale, float(lat)


def metres_per_degree_lon(lat_deg: float, crs: str = "EPSG:4326") -> float:
    """Length in metres of one degree of longitude along the parallel at lat_deg on the crs's
    ellipsoid: (pi/180) a cos(phi) / sqrt(1 - e^2 sin^2(phi)) (the parallel's radius is the prime
    vertical radius of curvature times cos(phi); Snyder 1987, Map Projections - A Working
    Manual, eq. 4-20/4-21)."""
    from pyproj import CRS

    ellipsoid = CRS.from_user_input(crs).ellipsoid
    a = float(ellipsoid.semi_major_metre) if ellipsoid else 6_378_137.0
    inv_f = float(ellipsoid.inverse_flattening) if ellipsoid else 298.257223563
    f = 1.0 / inv_f if inv_f else 0.0
    e2 = f * (2 - f)
    phi = math.radians(lat_deg)
    return math.pi / 180 * a * math.cos(phi) / math.sqrt(1 - e2 * math.sin(phi) ** 2)


def nice_length(span: float) -> float:
    """A scale-bar length: 1, 2 or 5 x 10^k, at most a quarter of span (span > 0)."""
    if span <= 0 or not math.isfinite(span):
        raise ValueError(f"span must be positive, not {span}")
    target = span / 4
    power = 10 ** math.floor(math.log10(target))
    for step in (5, 2, 1):
        if step * power <= target:
            return step * power
    return power  # pragma: no cover - target >= power always


def scale_bar(frame: MapFrame, extent: Bounds) -> ScaleBar | None:
    """A round length in metres, at most a quarter of the map's width; on a longitude/latitude
    map measured along the parallel through the map's centre (and labelled so)."""
    if frame.metres_per_unit is None:
        return None
    width_m = (extent[2] - extent[0]) * frame.metres_per_unit
    if width_m <= 0 or not math.isfinite(width_m):
        return None
    length_m = nice_length(width_m)
    label = f"{length_m / 1000:g} km" if length_m >= 1000 else f"{length_m:g} m"
    if frame.geographic:
        label += f" (along latitude {frame.centre_lat:.2f}°)"
    elif abs(frame.parallel_scale - 1.0) > 0.01:
        label += " (at the map's centre)"
    return ScaleBar(length_m, length_m / frame.metres_per_unit, label)


def outline_lonlat(
    bounds: Bounds, crs: str, *, points: int = 20
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """The rectangle bounds (in crs) as a closed ring of longitudes and latitudes, each edge
    densified to `points` points (PROJ via pyproj)."""
    from pyproj import CRS, Transformer

    left, bottom, right, top = bounds
    t = np.linspace(0.0, 1.0, points, endpoint=False)
    xs = np.concatenate(
        [left + (right - left) * t, np.full_like(t, right), right - (right - left) * t]
        + [np.full_like(t, left), [left]]
    )
    ys = np.concatenate(
        [np.full_like(t, bottom), bottom + (top - bottom) * t, np.full_like(t, top)]
        + [top - (top - bottom) * t, [bottom]]
    )
    source = CRS.from_user_input(crs)
    if source.is_geographic:
        return xs, ys
    lon, lat = Transformer.from_crs(source, "EPSG:4326", always_xy=True).transform(xs, ys)
    return np.asarray(lon, dtype=float), np.asarray(lat, dtype=float)


def metre_units(crs: str) -> bool:
    """True when crs is projected with axes in metres."""
    from pyproj import CRS

    c = CRS.from_user_input(crs)
    return bool(c.is_projected) and all(
        (a.unit_name or "").lower() in ("metre", "meter") for a in c.axis_info[:2]
    )


def tile_corners(bounds: Sequence[Bounds]) -> NDArray[np.float64]:
    """The four corners of each tile rectangle, shape (n, 4, 2), for one polygon collection
    (far cheaper to build and draw than a rectangle patch per tile)."""
    b = np.asarray(bounds, dtype=float).reshape(-1, 4)
    return np.stack([b[:, [0, 2, 2, 0]], b[:, [1, 1, 3, 3]]], axis=-1)
