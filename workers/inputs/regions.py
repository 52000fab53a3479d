"""Regions to aggregate over (provinces, delivery blocks): read, reproject, clip, rasterise.

A pixel belongs to a region when its centre lies inside the region's polygon (holes excluded);
a pixel counts in every region that contains it.
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np
import shapely
from numpy.typing import NDArray
from pyproj import CRS, Transformer
from shapely import box, segmentize
from shapely.geometry import shape
from shapely.geometry.base import BaseGeometry

from demaudit.workers.errors import MissingCRSError, SpecError
from demaudit.workers.inputs.confine import Roots, read_spec_file
from demaudit.workers.tile.grid import Grid, centres_in

DEFAULT_REGION_CRS = "EPSG:4326"


@dataclass(frozen=True)
class Region:
    """One region: its id, display name and polygon in ``crs`` (WKT or user input).

    ``note`` says how the polygon was repaired when the file's was invalid (else empty)."""

    region_id: str
    name: str
    geometry: BaseGeometry
    crs: str
    note: str = ""


#: The first bytes of an ESRI shapefile (its file code, 9994 big-endian).
_SHAPEFILE_MAGIC = b"\x00\x00\x27\x0a"


def read_regions(path: Path, *, id_property: str, roots: Roots = None) -> list[Region]:
    """Read a GeoJSON FeatureCollection of polygons; its CRS is the one it declares, else
    EPSG:4326.

    Anything else is refused with a SpecError naming the file and what was expected (a
    shapefile, binary data, JSON that is not a FeatureCollection, features that are not
    objects, features without a polygon). An invalid polygon (a self-intersecting ring, e.g. a
    bow-tie) is repaired with shapely.make_valid, keeping all of its area; the region's ``note``
    says so (see region_cautions). A feature with no area left is refused with its id.

    The file is read from one open file checked against ``roots`` (workers/inputs/confine.py:
    DataRootError when it leads outside them); messages show it relative to its root.
    """
    path = Path(path)
    doc = _feature_collection(path, roots)
    crs = _declared_crs(doc, path)
    features = doc.get("features")
    if not isinstance(features, list):
        raise SpecError(
            f"region.file: {path.name}: 'features' must be a list of GeoJSON Feature objects, "
            f"found {_kind(features)}"
        )
    regions = [
        _region(feature, number, path, id_property, crs) for number, feature in enumerate(features)
    ]
    if not regions:
        raise SpecError(f"region.file: {path.name} holds no features")
    ids = [r.region_id for r in regions]
    if len(set(ids)) != len(ids):
        raise SpecError(f"region.id_property: ids in {path.name} are not unique: {sorted(ids)}")
    return regions


def region_cautions(regions: Sequence[Region]) -> list[str]:
    """One line per repaired region, for summary.json's cautions."""
    return [r.note for r in regions if r.note]


def _feature_collection(path: Path, roots: Roots) -> dict:  # type: ignore[type-arg]
    expected = "expected a GeoJSON FeatureCollection (UTF-8 JSON text)"
    raw = read_spec_file(path, roots, field="region.file")
    if raw.startswith(_SHAPEFILE_MAGIC) or path.suffix.lower() in {".shp", ".shx", ".dbf"}:
        raise SpecError(
            f"region.file: {path.name} is a shapefile; {expected}. Convert it first, e.g. "
            f"'ogr2ogr -f GeoJSON regions.geojson {path.name}' (GDAL)"
        )
    try:
        doc = json.loads(raw.decode("utf-8-sig"))
    except UnicodeDecodeError:
        raise SpecError(
            f"region.file: {path.name} is not UTF-8 text (binary data, or text in another "
            f"encoding); {expected}"
        ) from None
    except json.JSONDecodeError as exc:
        raise SpecError(f"region.file: {path.name} is not valid JSON ({exc}); {expected}") from None
    if not isinstance(doc, dict) or doc.get("type") != "FeatureCollection":
        raise SpecError(f"region.file: {path.name} holds {_kind(doc)}; {expected}")
    return doc


def _kind(value: object) -> str:
    """What a JSON value is, in words, for messages."""
    if isinstance(value, dict):
        kind = value.get("type")
        return f"a GeoJSON {kind!r} object" if isinstance(kind, str) else "an object without 'type'"
    names = {list: "a list", str: "a string", bool: "a boolean", type(None): "null"}
    return names.get(type(value), "a number")


def _region(feature: object, number: int, path: Path, id_property: str, crs: str) -> Region:
    where = f"feature {number} of {path.name}"
    if not isinstance(feature, dict):
        raise SpecError(f"region.file: {where} is {_kind(feature)}, not a GeoJSON Feature object")
    props = feature.get("properties") or {}
    if not isinstance(props, dict):
        raise SpecError(f"region.file: {where} has properties that are {_kind(props)}")
    if id_property not in props:
        raise SpecError(f"region.id_property: {where} has no property {id_property!r}")
    region_id = str(props[id_property])
    where = f"{where} ({id_property} {region_id!r})"
    try:
        geometry = shape(feature["geometry"])
    except (KeyError, TypeError, ValueError, AttributeError, IndexError) as exc:
        raise SpecError(f"region.file: {where} has no valid geometry: {exc}") from None
    geometry, note = _polygonal(geometry, where)
    return Region(region_id, str(props.get("name", region_id)), geometry, crs, note)


def _polygonal(geometry: BaseGeometry, where: str) -> tuple[BaseGeometry, str]:
    """The geometry as a valid (multi)polygon, and a note when it had to be repaired."""
    if geometry.geom_type not in {"Polygon", "MultiPolygon"}:
        raise SpecError(f"region.file: {where} is a {geometry.geom_type}; regions must be polygons")
    if geometry.is_valid:
        return geometry, ""
    why = shapely.is_valid_reason(geometry)
    made = shapely.make_valid(geometry)
    parts = [g for g in shapely.get_parts(made) if g.geom_type in {"Polygon", "MultiPolygon"}]
    repaired = shapely.union_all(parts) if parts else None
    if repaired is None or repaired.is_empty or repaired.area <= 0:
        raise SpecError(f"region.file: {where} is an invalid polygon ({why}) with no area")
    count = len(shapely.get_parts(repaired))
    note = (
        f"region.file: {where} was an invalid polygon ({why}); repaired with "
        f"shapely.make_valid into {count} polygon{'s' if count > 1 else ''}, all of its area kept"
    )
    return repaired, note


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
        out.append(replace(region, geometry=geometry, crs=target.to_wkt()))
    return out


def clip_to(regions: Sequence[Region], bounds: tuple[float, float, float, float]) -> list[Region]:
    """The parts of regions (already in the bounds' CRS) inside bounds; regions outside dropped.
    A region that covers the bounds gives the bounds' box (no overlay: the same pixels)."""
    frame = box(*bounds)
    clipped = []
    for region in regions:
        if region.geometry.covers(frame):
            clipped.append(replace(region, geometry=frame))
        elif region.geometry.intersects(frame):
            part = region.geometry.intersection(frame)
            if not part.is_empty:
                clipped.append(replace(region, geometry=part))
    return clipped


def region_mask(region: Region, grid: Grid) -> NDArray[np.bool_]:
    """True for pixels of grid whose centre lies inside the region (same CRS as grid)."""
    return centres_in([region.geometry], grid)
