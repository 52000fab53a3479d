"""Regions to aggregate over (provinces, delivery blocks): read, reproject, clip, rasterise.

A pixel belongs to a region when its centre lies inside the region's polygon (holes excluded);
a pixel counts in every region that contains it.
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import shapely
from numpy.typing import NDArray
from pyproj import CRS, Transformer
from rasterio.features import rasterize
from shapely import box, segmentize
from shapely.geometry import shape
from shapely.geometry.base import BaseGeometry

from workers.errors import MissingCRSError, SpecError
from workers.grid import Grid

DEFAULT_REGION_CRS = "EPSG:4326"


@dataclass(frozen=True)
class Region:
    """One region: its id, display name and polygon in ``crs`` (WKT or user input)."""

    region_id: str
    name: str
    geometry: BaseGeometry
    crs: str


def read_regions(path: Path, *, id_property: str) -> list[Region]:
    """Read a GeoJSON FeatureCollection; its CRS is the one it declares, else EPSG:4326."""
    try:
        doc = json.loads(Path(path).read_text(encoding="utf-8"))
    except (OSError, json.JSONDecodeError) as exc:
        raise SpecError(f"region.file: cannot read {path}: {exc}") from None
    if not isinstance(doc, dict) or doc.get("type") != "FeatureCollection":
        raise SpecError(f"region.file: {path} is not a GeoJSON FeatureCollection")
    crs = _declared_crs(doc, path)
    regions: list[Region] = []
    for number, feature in enumerate(doc.get("features", [])):
        props = feature.get("properties") or {}
        if id_property not in props:
            raise SpecError(
                f"region.id_property: feature {number} of {path.name} "
                f"has no property {id_property!r}"
            )
        try:
            geometry = shape(feature["geometry"])
        except (KeyError, TypeError, ValueError, AttributeError) as exc:
            raise SpecError(f"region.file: feature {number} has no valid geometry: {exc}") from None
        region_id = str(props[id_property])
        regions.append(Region(region_id, str(props.get("name", region_id)), geometry, crs))
    if not regions:
        raise SpecError(f"region.file: {path} holds no features")
    ids = [r.region_id for r in regions]
    if len(set(ids)) != len(ids):
        raise SpecError(f"region.id_property: ids in {path.name} are not unique: {sorted(ids)}")
    return regions


def _declared_crs(doc: dict, path: Path) -> str:  # type: ignore[type-arg]
    declared = doc.get("crs")
    if declared is None:
        return DEFAULT_REGION_CRS
    try:
        name = declared["properties"]["name"]
        return CRS.from_user_input(name).to_wkt()
    except (KeyError, TypeError, Exception) as exc:  # noqa: BLE001 - any unreadable CRS member
        raise MissingCRSError(
            f"region.file: {path.name} declares a CRS that cannot be read: {exc}"
        ) from None


def to_crs(regions: Sequence[Region], crs: str, *, densify_m: float = 50.0) -> list[Region]:
    """The regions reprojected into crs (edges densified first, so they bend as they should)."""
    target = CRS.from_user_input(crs)
    out = []
    for region in regions:
        source = CRS.from_user_input(region.crs)
        geometry = region.geometry
        if not source.equals(target):
            step = densify_m if source.is_projected else densify_m / 111_000.0
            transformer = Transformer.from_crs(source, target, always_xy=True)

            def to_target(
                xy: NDArray[np.float64], t: Transformer = transformer
            ) -> NDArray[np.float64]:
                return np.column_stack(t.transform(xy[:, 0], xy[:, 1]))

            geometry = shapely.transform(segmentize(geometry, step), to_target)
        out.append(Region(region.region_id, region.name, geometry, target.to_wkt()))
    return out


def clip_to(regions: Sequence[Region], bounds: tuple[float, float, float, float]) -> list[Region]:
    """The parts of regions (already in the bounds' CRS) inside bounds; regions outside dropped."""
    frame = box(*bounds)
    clipped = []
    for region in regions:
        if region.geometry.intersects(frame):
            part = region.geometry.intersection(frame)
            if not part.is_empty:
                clipped.append(Region(region.region_id, region.name, part, region.crs))
    return clipped


def region_mask(region: Region, grid: Grid) -> NDArray[np.bool_]:
    """True for pixels of grid whose centre lies inside the region (same CRS as grid)."""
    burned = rasterize(
        [(region.geometry, 1)],
        out_shape=grid.shape,
        transform=grid.affine,
        fill=0,
        all_touched=False,
        dtype="uint8",
    )
    return burned.astype(bool)
