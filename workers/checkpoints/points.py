"""Surveyed checkpoints: read them, and sample the test model at each one.

Reading keeps every row: a point that cannot be used (no height, duplicated id, bad
coordinates) is returned as :class:`Rejected` with the reason, never dropped silently.

Sampling rule (``bilinear_at``): the test model's value at a point is the bilinear interpolation of
the four pixel centres around it. If any of the four is nodata the point is rejected as 'on a
void'; if they are not all inside the test data, as 'at the edge of the test data'. Points near a
tile edge are sampled from the mosaic of neighbouring tiles, so tile edges do not reject points.
"""

from __future__ import annotations

import csv
import hashlib
import json
import math
import re
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray
from pyproj import CRS
from pyproj.exceptions import CRSError

from demaudit.workers.errors import SpecError
from demaudit.workers.inputs.confine import Roots, read_spec_file
from demaudit.workers.spec import CheckpointSource
from demaudit.workers.tile.grid import Grid


@dataclass(frozen=True)
class Checkpoint:
    """One surveyed point: id, horizontal coordinates, height (file units), land-cover class."""

    point_id: str
    x: float
    y: float
    height: float
    landcover: int | None = None


@dataclass(frozen=True)
class Rejected:
    """A point that was not used, and why."""

    point_id: str
    reason: str


@dataclass(frozen=True)
class CheckpointFile:
    """What a checkpoint file holds: usable points, rejected rows and header key-values;
    ``fingerprint`` is the SHA-256 of the bytes these were read from."""

    points: tuple[Checkpoint, ...]
    rejected: tuple[Rejected, ...]
    header: dict[str, str]
    declared_crs: str | None = None
    fingerprint: str = ""


def read_checkpoints(
    path: Path,
    *,
    id_column: str = "id",
    x_column: str = "easting",
    y_column: str = "northing",
    height_column: str = "height",
    landcover_column: str | None = "landcover",
    roots: Roots = None,
) -> CheckpointFile:
    """Read CSV (with '#' header lines of 'key: value') or GeoJSON points.

    The file is checked as a whole before any row: text in UTF-8 (with or without a byte-order
    mark) or else Latin-1 (binary data is refused); a CSV needs the x, y and height columns
    (SpecError naming the missing ones and the columns found); a GeoJSON must be a
    FeatureCollection of objects with the height property. CSV delimiter: ',', ';' or tab,
    whichever the column line holds most; with ';' or tab, numbers written with a decimal comma
    (``12,5``, also ``512.345,67``) are read as such, the European spreadsheet convention.
    """
    path = Path(path)
    text, fingerprint = _decoded(path, roots)
    required = (x_column, y_column, height_column)
    if path.suffix.lower() in {".geojson", ".json"}:
        rows, header, crs = _geojson_rows(text, path, x_column, y_column)
        _require_properties(rows, path, height_column, coordinates=(x_column, y_column))
    else:
        numeric = [c for c in (*required, landcover_column) if c]
        rows, header, crs = _csv_rows(text, path=path, required=required, numeric=numeric)
    columns = (id_column, x_column, y_column, height_column, landcover_column)
    points, rejected = _parse_rows(rows, columns)
    return CheckpointFile(
        tuple(points), tuple(rejected), header, crs or header.get("horizontal_crs"), fingerprint
    )


def _decoded(path: Path, roots: Roots) -> tuple[str, str]:
    """The file's text: UTF-8 (a byte-order mark is dropped), else Latin-1; binary refused.
    Read from one open file checked against roots (workers/inputs/confine.py); with the SHA-256 of
    the bytes read."""
    raw = read_spec_file(path, roots, field="checkpoints.file")
    if b"\x00" in raw:
        raise SpecError(
            f"checkpoints.file: {path.name} is not text (it holds binary data); expected CSV "
            "or GeoJSON"
        )
    fingerprint = hashlib.sha256(raw).hexdigest()
    try:
        return raw.decode("utf-8-sig"), fingerprint
    except UnicodeDecodeError:
        return raw.decode("latin-1"), fingerprint


_DELIMITERS = (",", ";", "\t")
_DECIMAL_COMMA = re.compile(r"^\s*[+-]?(\d{1,3}(\.\d{3})+|\d+),\d+\s*$")


def _csv_rows(
    text: str, *, path: Path, required: Sequence[str], numeric: Sequence[str]
) -> tuple[list[dict[str, Any]], dict[str, str], str | None]:
    header: dict[str, str] = {}
    body = []
    for line in text.splitlines():
        if line.startswith("#"):
            key, sep, value = line[1:].partition(":")
            if sep:
                header[key.strip()] = value.strip().split()[0] if value.strip() else ""
        elif line.strip():
            body.append(line)
    if not body:
        raise SpecError(f"checkpoints.file: {path.name} holds no column line and no rows")
    delimiter = max(_DELIMITERS, key=body[0].count)
    reader = csv.DictReader(body, delimiter=delimiter)
    found = [name.strip() for name in reader.fieldnames or []]
    missing = [c for c in required if c not in found]
    if missing:
        shown = "tab" if delimiter == "\t" else repr(delimiter)
        raise SpecError(
            f"checkpoints.file: {path.name}: no {' / '.join(repr(c) for c in missing)} "
            f"column; found: {delimiter.join(found)} (delimiter {shown}). Name the columns in "
            "checkpoints.x_column, y_column and height_column"
        )
    reader.fieldnames = found
    rows = list(reader)
    if delimiter != ",":
        for row in rows:
            for column in numeric:
                cell = row.get(column)
                if isinstance(cell, str) and _DECIMAL_COMMA.match(cell):
                    row[column] = cell.replace(".", "").replace(",", ".")
    return rows, header, None


def _geojson_rows(
    text: str, path: Path, x_column: str, y_column: str
) -> tuple[list[dict[str, Any]], dict[str, str], str | None]:
    expected = "expected a GeoJSON FeatureCollection of Point features"
    try:
        doc = json.loads(text)
    except json.JSONDecodeError as exc:
        raise SpecError(
            f"checkpoints.file: {path.name} is not valid JSON ({exc}); {expected}"
        ) from None
    features = doc.get("features") if isinstance(doc, dict) else None
    if not isinstance(features, list) or not all(isinstance(f, dict) for f in features):
        raise SpecError(
            f"checkpoints.file: {path.name} is not a list of feature objects; {expected}"
        )
    crs = None
    if isinstance(doc.get("crs"), dict):
        crs = (doc["crs"].get("properties") or {}).get("name")
    rows = []
    for feature in features:
        props = feature.get("properties")
        row = dict(props) if isinstance(props, dict) else {}
        geometry = feature.get("geometry")
        geometry = geometry if isinstance(geometry, dict) else {}
        coords = geometry.get("coordinates") if geometry.get("type") == "Point" else None
        usable = isinstance(coords, list) and len(coords) >= 2
        row[x_column], row[y_column] = (coords[0], coords[1]) if usable else (None, None)  # type: ignore[index]
        rows.append(row)
    return rows, {}, crs


def _require_properties(
    rows: list[dict[str, Any]], path: Path, height_column: str, *, coordinates: Sequence[str]
) -> None:
    """SpecError when no feature has the height property (the properties found are named)."""
    if rows and not any(height_column in row for row in rows):
        found = sorted({k for row in rows for k in row} - {"", *coordinates})
        raise SpecError(
            f"checkpoints.file: {path.name}: no feature has a {height_column!r} property; found: "
            f"{', '.join(found)}. Name it in checkpoints.height_column"
        )


def open_checkpoints(
    path: Path, source: CheckpointSource, *, roots: Roots = None
) -> CheckpointFile:
    """Read the checkpoint file a spec names and check it can be used at all, before any tile
    runs: the columns (read_checkpoints), a horizontal CRS (checkpoint_crs), and at least one
    usable point. Every problem is a SpecError naming the file and the spec field."""
    data = read_checkpoints(
        path,
        id_column=source.id_column,
        x_column=source.x_column,
        y_column=source.y_column,
        height_column=source.height_column,
        landcover_column=source.landcover_column,
        roots=roots,
    )
    checkpoint_crs(data, path=Path(path), spec_crs=source.crs)
    if not data.points:
        reasons = "; ".join(f"{r.point_id}: {r.reason}" for r in data.rejected[:3])
        raise SpecError(
            f"checkpoints.file: none of the {len(data.rejected)} points of {Path(path).name} "
            f"can be used ({reasons or 'the file holds no rows'})"
        )
    return data


def checkpoint_crs(data: CheckpointFile, *, path: Path, spec_crs: str | None) -> str:
    """The points' horizontal CRS: the spec's, else the file's declared one, else EPSG:4326 for
    GeoJSON (its default). SpecError when there is none or it cannot be read."""
    geojson = path.suffix.lower() in {".geojson", ".json"}
    name = spec_crs or data.declared_crs or ("EPSG:4326" if geojson else None)
    if name is None:
        raise SpecError(
            f"checkpoints.crs: {path.name} declares no horizontal CRS and the spec names none; "
            "add a line '# horizontal_crs: EPSG:<code>' to the file or set checkpoints.crs"
        )
    where = "checkpoints.crs:" if spec_crs else f"checkpoints.file: {path.name} declares"
    try:
        CRS.from_user_input(name)
    except CRSError as exc:
        raise SpecError(f"{where} the CRS {name!r}, which cannot be read: {exc}") from None
    return name


def _parse_rows(
    rows: list[dict[str, Any]], columns: tuple[str, str, str, str, str | None]
) -> tuple[list[Checkpoint], list[Rejected]]:
    id_col, x_col, y_col, h_col, cover_col = columns
    xs, ys, hs = (_numbers([row.get(c) for row in rows]) for c in (x_col, y_col, h_col))
    covers = _numbers([row.get(cover_col) for row in rows]) if cover_col else None
    points: list[Checkpoint] = []
    rejected: list[Rejected] = []
    seen: set[str] = set()
    for i, row in enumerate(rows):
        point_id = str(row.get(id_col) or f"row {i + 1}")
        if point_id in seen:
            rejected.append(Rejected(point_id, "duplicated id (the first occurrence is used)"))
            continue
        seen.add(point_id)
        x, y, h = xs[i], ys[i], hs[i]
        if math.isnan(h):
            rejected.append(Rejected(point_id, f"no height in column {h_col!r}"))
        elif math.isnan(x) or math.isnan(y):
            rejected.append(Rejected(point_id, f"no coordinates in {x_col!r}/{y_col!r}"))
        else:
            cover = None if covers is None or math.isnan(covers[i]) else int(covers[i])
            points.append(Checkpoint(point_id, float(x), float(y), float(h), cover))
    return points, rejected


def _numbers(values: list[object]) -> list[float]:
    """Values as floats, NaN where a value is missing, not a number or not finite."""
    try:  # the common case: a clean numeric column, converted at once
        array = np.asarray(values, dtype=np.float64)
    except (TypeError, ValueError):
        return [math.nan if (n := _number(v)) is None else n for v in values]
    return np.where(np.isfinite(array), array, np.nan).tolist()


def _number(value: object) -> float | None:
    if value is None or (isinstance(value, str) and not value.strip()):
        return None
    try:
        number = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return None
    return number if math.isfinite(number) else None


def bilinear_at(
    heights: NDArray[np.float64], grid: Grid, x: NDArray[np.float64], y: NDArray[np.float64]
) -> tuple[NDArray[np.float64], list[str | None]]:
    """Bilinear values of a north-up grid at map points, and a reason where there is none."""
    a, _, c, _, e, f = grid.transform
    col = (np.asarray(x) - c) / a - 0.5
    row = (np.asarray(y) - f) / e - 0.5
    values = np.full(col.shape, np.nan)
    reasons: list[str | None] = []
    for i, (r, k) in enumerate(zip(row, col, strict=True)):
        # a point exactly on the last row/column of centres still has four neighbours
        r0 = min(math.floor(r), heights.shape[0] - 2)
        k0 = min(math.floor(k), heights.shape[1] - 2)
        if r < 0 or k < 0 or r > heights.shape[0] - 1 or k > heights.shape[1] - 1:
            reasons.append("at the edge of the test data (no four pixel centres around it)")
            continue
        block = heights[r0 : r0 + 2, k0 : k0 + 2]
        if not np.all(np.isfinite(block)):
            reasons.append("on a void of the test model (nodata next to the point)")
            continue
        dr, dk = r - r0, k - k0
        top = block[0, 0] * (1 - dk) + block[0, 1] * dk
        bottom = block[1, 0] * (1 - dk) + block[1, 1] * dk
        values[i] = top * (1 - dr) + bottom * dr
        reasons.append(None)
    return values, reasons


def sample_test_tile(
    tile_id: str,
    tiles: list[Any],
    points: list[tuple[str, float, float]],
    *,
    nodata: float | None,
    units: str,
) -> list[tuple[str, float | None, str | None]]:
    """Task: the test model (metres) at points lying in one tile, from the mosaic of that tile
    and its neighbours ``tiles``; (id, value, reason it has none)."""
    from rasterio.errors import RasterioError

    from demaudit.workers.errors import AuditError
    from demaudit.workers.inputs.rasters import read_mosaic
    from demaudit.workers.tile.datum import to_metres

    xs = np.array([p[1] for p in points])
    ys = np.array([p[2] for p in points])
    # read only the window around the points (plus two pixels), not the whole tile
    window = (float(xs.min()), float(ys.min()), float(xs.max()), float(ys.max()))
    try:
        mosaic, grid = read_mosaic(
            tiles, window, nodata=nodata, margin_px=2, units=units, role="test"
        )
    except (AuditError, RasterioError, OSError) as exc:
        return [(pid, None, f"test tile {tile_id} unreadable: {exc}") for pid, _, _ in points]
    heights = to_metres(mosaic, units)
    values, reasons = bilinear_at(heights, grid, xs, ys)
    return [
        (pid, None if reason else float(v), reason)
        for (pid, _, _), v, reason in zip(points, values, reasons, strict=True)
    ]
