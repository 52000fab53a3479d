"""Checkpoint audit of a job: sample the test model at every surveyed point on the cluster,
bring the points to the test's datum and unit, and summarise and grade the residuals."""

from __future__ import annotations

import csv
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import shapely
from distributed import Client
from numpy.typing import NDArray
from pyproj import CRS, Transformer
from pyproj.exceptions import CRSError
from shapely import STRtree, box, points

from demaudit.workers.checkpoints import grading
from demaudit.workers.checkpoints.points import CheckpointFile, open_checkpoints, sample_test_tile
from demaudit.workers.inputs.catalog import TileIndex, TileInfo, file_fingerprint
from demaudit.workers.inputs.regions import Region
from demaudit.workers.spec import ResolvedJob
from demaudit.workers.stats.accuracy import residual_statistics, vertical_accuracy
from demaudit.workers.tile.datum import geoid_undulation, to_metres
from demaudit.workers.tile.strata import ClassInfo
from demaudit.workers.tile.task import TileOptions

RESIDUALS_NAME = "checkpoint_residuals.csv"
Bounds = Sequence[float]  # left, bottom, right, top


def read_job_checkpoints(job: ResolvedJob) -> CheckpointFile:
    """Read the job's checkpoint file as its spec says (SpecError when it cannot be used): the
    runner calls this before the first tile, so a bad file costs no results."""
    spec = job.spec.checkpoints
    assert spec is not None and job.checkpoint_file is not None
    return open_checkpoints(job.checkpoint_file, spec, roots=job.data_roots)


def audit_checkpoints(
    client: Client,
    job: ResolvedJob,
    tests: Sequence[TileInfo],
    *,
    regions: Mapping[str, list[Region]],
    options: TileOptions,
    out_dir: Path,
    earlier: Mapping[str, float] | None = None,
    changed_areas: Sequence[Bounds] = (),
    data: CheckpointFile | None = None,
) -> dict[str, Any]:
    """The checkpoint section of summary.json; also writes checkpoint_residuals.csv.

    data: the file as read_job_checkpoints read it before the run (read here when None).

    earlier: test heights (metres) sampled by a baseline run, by point id. A point takes its
    earlier height instead of being sampled again unless it lies in one of changed_areas (the
    footprints, in the test CRS, of the test tiles recomputed or gone since), or within two test
    pixels of one: its bilinear neighbourhood may reach into the tile next door.
    """
    spec = job.spec.checkpoints
    assert spec is not None and job.checkpoint_file is not None
    data = data if data is not None else read_job_checkpoints(job)
    # rejected rows get keys of their own: a duplicated id must not hide the point it repeats
    records = {
        f"#rejected-{i}": {"id": r.point_id, "status": "rejected", "reason": r.reason}
        for i, r in enumerate(data.rejected)
    }
    survey = spec.survey_rmse_m
    if survey is None and "survey_rmse_m" in data.header:
        survey = float(data.header["survey_rmse_m"])
    test_crs = CRS.from_wkt(tests[0].grid.crs)
    crs_name = (
        spec.crs
        or data.declared_crs
        or ("EPSG:4326" if job.checkpoint_file.suffix.lower() in {".geojson", ".json"} else None)
    )
    try:
        point_crs = CRS.from_user_input(crs_name) if crs_name else None
    except CRSError:
        point_crs = None
    if point_crs is None:
        for p in data.points:
            records[p.point_id] = {
                "id": p.point_id,
                "status": "rejected",
                "reason": f"unknown CRS {crs_name!r} for the points; name it in checkpoints.crs",
            }
        return _section(
            records,
            survey,
            tests,
            regions={},
            classes=options.landcover_classes,
            job=job,
            out_dir=out_dir,
            fingerprint=data.fingerprint or None,
        )
    _sample(
        client,
        data,
        point_crs,
        test_crs,
        tests,
        options,
        records,
        earlier=earlier or {},
        changed_areas=changed_areas,
    )
    _to_test_datum(data, point_crs, options, job, records)
    return _section(
        records,
        survey,
        tests,
        regions=regions,
        classes=options.landcover_classes,
        job=job,
        out_dir=out_dir,
        fingerprint=data.fingerprint or None,
    )


def _sample(
    client: Client,
    data: CheckpointFile,
    point_crs: CRS,
    test_crs: CRS,
    tests: Sequence[TileInfo],
    options: TileOptions,
    records: dict[str, dict[str, Any]],
    *,
    earlier: Mapping[str, float],
    changed_areas: Sequence[Bounds],
) -> None:
    to_test = Transformer.from_crs(point_crs, test_crs, always_xy=True)
    xs, ys = to_test.transform([p.x for p in data.points], [p.y for p in data.points])
    tree = STRtree([box(*t.bounds) for t in tests])
    index = TileIndex(tests)
    by_tile: dict[int, list[tuple[str, float, float]]] = {}
    hits = tree.query(points(np.column_stack([xs, ys])), predicate="intersects")
    first_tile = dict(zip(hits[0][::-1], hits[1][::-1], strict=True))  # lowest tile index wins
    again = points_near(
        np.asarray(xs), np.asarray(ys), changed_areas, 2 * max(tests[0].grid.resolution)
    )
    for i, p in enumerate(data.points):
        records[p.point_id] = {
            "id": p.point_id,
            "x": p.x,
            "y": p.y,
            "height": p.height,
            "landcover": p.landcover,
            "x_test_crs": float(xs[i]),
            "y_test_crs": float(ys[i]),
        }
        if i not in first_tile:
            records[p.point_id] |= {"status": "rejected", "reason": "outside every test tile"}
        elif not again[i] and p.point_id in earlier:  # nothing under it changed since
            records[p.point_id] |= {"status": "used", "test_height_m": earlier[p.point_id]}
        else:
            by_tile.setdefault(int(first_tile[i]), []).append(
                (p.point_id, float(xs[i]), float(ys[i]))
            )
    futures = [
        client.submit(
            sample_test_tile,
            tests[k].tile_id,
            index.overlapping(tests[k].grid.expanded(2)),
            pts,
            nodata=options.test_nodata,
            units=options.test_units,
            pure=False,
        )
        for k, pts in by_tile.items()
    ]
    for part in client.gather(futures):
        for point_id, value, reason in part:
            if reason:
                records[point_id] |= {"status": "rejected", "reason": reason}
            else:
                records[point_id] |= {"status": "used", "test_height_m": value}


def points_near(
    xs: NDArray[np.float64], ys: NDArray[np.float64], areas: Sequence[Bounds], margin: float
) -> NDArray[np.bool_]:
    """Which points lie in any of the areas grown by margin on every side (edges included)."""
    inside = np.zeros(xs.shape, dtype=bool)
    for left, bottom, right, top in areas:
        in_x = (xs >= left - margin) & (xs <= right + margin)
        inside |= in_x & (ys >= bottom - margin) & (ys <= top + margin)
    return inside


def _to_test_datum(
    data: CheckpointFile,
    point_crs: CRS,
    options: TileOptions,
    job: ResolvedJob,
    records: dict[str, dict[str, Any]],
) -> None:
    """Checkpoint heights in metres in the test's vertical datum, and dh = test - checkpoint."""
    spec = job.spec.checkpoints
    assert spec is not None
    used = [p for p in data.points if records[p.point_id].get("status") == "used"]
    if not used:
        return
    to_lonlat = Transformer.from_crs(point_crs, "EPSG:4326", always_xy=True)
    lon, lat = to_lonlat.transform([p.x for p in used], [p.y for p in used])
    lon, lat = np.asarray(lon), np.asarray(lat)
    heights = to_metres(np.array([p.height for p in used]), spec.units)
    offset = geoid_undulation(lon, lat, vertical_crs=spec.vertical_crs, grid_dirs=options.grid_dirs)
    offset -= geoid_undulation(
        lon, lat, vertical_crs=options.test_vertical_crs, grid_dirs=options.grid_dirs
    )
    for p, h, off in zip(used, heights, offset, strict=True):
        record = records[p.point_id]
        record["checkpoint_height_m"] = float(h + off)
        record["dh_m"] = record["test_height_m"] - record["checkpoint_height_m"]


def _section(
    records: dict[str, dict[str, Any]],
    survey: float | None,
    tests: Sequence[TileInfo],
    *,
    regions: Mapping[str, list[Region]],
    classes: Sequence[ClassInfo],
    job: ResolvedJob,
    out_dir: Path,
    fingerprint: str | None,
) -> dict[str, Any]:
    """The summary's checkpoints section; fingerprint: SHA-256 of the bytes the points were
    read from."""
    used = [r for r in records.values() if r.get("status") == "used"]
    group_of = {c.value: c.group for c in classes}
    unclassified_group = job.spec.checkpoints.unclassified_group if job.spec.checkpoints else None
    xs = np.array([r["x_test_crs"] for r in used])
    ys = np.array([r["y_test_crs"] for r in used])
    inside = {
        g.region_id: shapely.intersects_xy(g.geometry, xs, ys)
        for g in regions.get(tests[0].grid.crs, [])
    }
    group = unclassified_group or "non_vegetated"
    for r in used:
        r["cover_group"], r["unclassified"] = grading.cover_group(
            r.get("landcover"), group_of, unclassified_group=group
        )
    dh = np.array([r["dh_m"] for r in used])
    nv = np.array([r["dh_m"] for r in used if r["cover_group"] == "non_vegetated"])
    veg = np.array([r["dh_m"] for r in used if r["cover_group"] == "vegetated"])
    va = vertical_accuracy(nv, veg)
    area_km2 = sum((t.bounds[2] - t.bounds[0]) * (t.bounds[3] - t.bounds[1]) for t in tests) / 1e6
    measured = grading.Measured(
        _float(va["rmse_z_non_vegetated"]),
        _float(va["vva_95"]),
        len(nv),
        len(veg),
        survey_rmse_m=survey,
        area_km2=area_km2,
        rmse_z_vegetated=_float(va["rmse_z_vegetated"]),
        rmse_z_all=_float(va["rmse_z_all"]),
    )
    cautions = _cover_cautions(used, group)
    _write_residuals(out_dir / RESIDUALS_NAME, records)
    return {
        "file": job.shown(job.checkpoint_file) if job.checkpoint_file else None,
        "file_fingerprint": fingerprint,
        "survey_rmse_m": survey,
        "counts": {"read": len(records), "used": len(used), "rejected": len(records) - len(used)},
        "stats": residual_statistics(dh),
        "vertical_accuracy": va,
        "by_class": _grouped(used, "landcover"),
        "by_cover_group": _grouped(used, "cover_group"),
        "by_region": {
            region_id: residual_statistics(dh[mask])
            for region_id, mask in inside.items()
            if mask.any()
        },
        "grading": grade(measured, job, assumptions=cautions),
        "cautions": cautions,
        "rejected": [
            {"id": r["id"], "reason": r["reason"]}
            for r in records.values()
            if r.get("status") != "used"
        ],
        "residuals_file": RESIDUALS_NAME,
    }


def _float(value: float | int | None) -> float | None:
    return None if value is None else float(value)


def _cover_cautions(used: Sequence[Mapping[str, Any]], unclassified_group: str) -> list[str]:
    """What the cover groups of the used checkpoints rest on, for cautions and grades."""
    out = []
    no_class = sum(bool(r["unclassified"]) and r.get("landcover") is None for r in used)
    unread = sum(bool(r["unclassified"]) and r.get("landcover") is not None for r in used)
    graded = (
        "left out of grading"
        if unclassified_group == "excluded"
        else f"graded as {unclassified_group.replace('_', '-')}"
    )
    rule = "(checkpoints.unclassified_group; unclassified pixels count as non-vegetated too)"
    if no_class:
        out.append(
            f"{no_class} of {len(used)} checkpoints have no land-cover class: {graded} {rule}"
        )
    if unread:
        out.append(
            f"{unread} of {len(used)} checkpoints have a land-cover class but the job lists no "
            f"land-cover classes to read it by (landcover.classes): {graded} {rule}"
        )
    unknown = sum(r["cover_group"] == "unknown" for r in used)
    if unknown:
        out.append(
            f"{unknown} of {len(used)} checkpoints have a land-cover class not listed in "
            "landcover.classes: left out of grading"
        )
    return out


def grade(
    measured: grading.Measured, job: ResolvedJob, *, assumptions: Sequence[str] = ()
) -> list[dict[str, Any]]:
    """Grade the measures against each standard the spec names; each grade repeats the
    assumptions its cover groups rest on."""
    g = job.spec.grading
    out = []
    for standard in g.standards:
        if standard == "nssda":
            out.append(
                grading.grade_nssda(measured, required_accuracy_m=g.nssda_required_accuracy_m)
            )
        elif standard == "asprs2014":
            out.append(grading.grade_asprs2014(measured, class_cm=g.asprs_class_cm))
        elif standard == "asprs2023":
            out.append(grading.grade_asprs2023(measured, class_cm=g.asprs_class_cm))
        elif standard == "quality_level":
            out.append(grading.grade_quality_level(measured, level=g.quality_level))
        elif standard == "user" and g.user:
            out.append(grading.grade_user(measured, {str(k): v for k, v in g.user.items()}))
    if assumptions:
        for entry in out:
            entry["assumptions"] = list(assumptions)
    if measured.indicative:
        for entry in out:
            entry["indicative"] = True
            entry["note"] = (
                "graded on raster-vs-raster pixels: indicative only; the standards "
                "define checkpoint tests"
            )
    return out


def _grouped(used: list[dict[str, Any]], key: str) -> dict[str, Any]:
    groups: dict[str, list[float]] = {}
    for r in used:
        groups.setdefault(str(r.get(key)), []).append(r["dh_m"])
    return {k: residual_statistics(v) for k, v in sorted(groups.items())}


def earlier_heights(
    folder: Path, document: Mapping[str, Any], job: ResolvedJob
) -> dict[str, float]:
    """Test heights a baseline run sampled, by point id (empty when the checkpoint file or the
    test's unit changed, or the baseline has none)."""
    section = document.get("checkpoints") or {}
    path = Path(folder) / RESIDUALS_NAME
    if job.checkpoint_file is None or not path.is_file():
        return {}
    if section.get("file_fingerprint") != file_fingerprint(
        job.checkpoint_file, roots=job.data_roots
    ):
        return {}
    with open(path, newline="", encoding="utf-8") as fh:
        reader = csv.reader(fh)
        columns = next(reader, [])
        if not {"id", "status", "test_height_m"} <= set(columns):
            return {}
        pid, status, height = (columns.index(c) for c in ("id", "status", "test_height_m"))
        return {
            row[pid]: float(row[height]) for row in reader if row[status] == "used" and row[height]
        }


def _write_residuals(path: Path, records: dict[str, dict[str, Any]]) -> None:
    columns = [
        "id",
        "status",
        "reason",
        "x",
        "y",
        "height",
        "landcover",
        "cover_group",
        "test_height_m",
        "checkpoint_height_m",
        "dh_m",
    ]
    with open(path, "w", newline="", encoding="utf-8") as fh:
        writer = csv.writer(fh)
        writer.writerow(columns)
        writer.writerows([r.get(c, "") for c in columns] for r in records.values())
