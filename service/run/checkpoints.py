"""Checkpoint audit of a job: sample the test model at every surveyed point on the cluster (the
only Dask step), then the pure steps of workers/checkpoints/residuals.py (datum, dh) and
section.py (statistics, grades); writes checkpoint_residuals.csv."""

from __future__ import annotations

import csv
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
from distributed import Client
from pyproj import CRS, Transformer
from pyproj.exceptions import CRSError

from demaudit.workers.checkpoints.points import CheckpointFile, open_checkpoints, sample_test_tile
from demaudit.workers.checkpoints.residuals import (
    RESIDUAL_COLUMNS,
    Bounds,
    Datums,
    Rows,
    in_test_datum,
    place_points,
    points_near,
    rejected_rows,
    unknown_crs_rows,
    with_samples,
)
from demaudit.workers.checkpoints.section import (
    SectionInputs,
    checkpoint_section,
    unclassified_group_of,
    with_cover_groups,
)
from demaudit.workers.inputs.catalog import TileInfo, file_fingerprint
from demaudit.workers.inputs.regions import Region
from demaudit.workers.inputs.tile_index import TileIndex
from demaudit.workers.outputs.layout import RESIDUALS_NAME
from demaudit.workers.spec import ResolvedJob
from demaudit.workers.tile.task import TileOptions

__all__ = ["audit_checkpoints", "earlier_heights", "read_job_checkpoints", "write_residuals"]


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
    point_crs, crs_name = _point_crs(job, data)
    rows = rejected_rows(data)
    if point_crs is None:
        rows |= unknown_crs_rows(data, crs_name)
        regions = {}
    else:
        rows |= _sampled(client, data, point_crs, tests, options, earlier or {}, changed_areas)
        datums = Datums(spec.units, spec.vertical_crs, options.test_vertical_crs, options.grid_dirs)
        rows = in_test_datum(rows, data.points, point_crs, datums)
    group = unclassified_group_of(job)
    rows = with_cover_groups(rows, options.landcover_classes, group)
    given = SectionInputs(
        grading=job.spec.grading,
        unclassified_group=group,
        survey_rmse_m=_survey_rmse(job, data),
        tests=tests,
        regions=regions,
        shown_file=job.shown(job.checkpoint_file) if job.checkpoint_file else None,
        fingerprint=data.fingerprint or None,
        residuals_file=RESIDUALS_NAME,
    )
    section = checkpoint_section(rows, given)
    write_residuals(out_dir / RESIDUALS_NAME, rows)
    return section


def _survey_rmse(job: ResolvedJob, data: CheckpointFile) -> float | None:
    """The survey's own RMSE (metres): the spec's, else the file header's."""
    spec = job.spec.checkpoints
    assert spec is not None
    if spec.survey_rmse_m is None and "survey_rmse_m" in data.header:
        return float(data.header["survey_rmse_m"])
    return spec.survey_rmse_m


def _point_crs(job: ResolvedJob, data: CheckpointFile) -> tuple[CRS | None, str | None]:
    """The points' CRS (None when unknown) and its name as given."""
    spec = job.spec.checkpoints
    assert spec is not None and job.checkpoint_file is not None
    geojson = job.checkpoint_file.suffix.lower() in {".geojson", ".json"}
    crs_name = spec.crs or data.declared_crs or ("EPSG:4326" if geojson else None)
    try:
        return (CRS.from_user_input(crs_name) if crs_name else None), crs_name
    except CRSError:
        return None, crs_name


def _sampled(
    client: Client,
    data: CheckpointFile,
    point_crs: CRS,
    tests: Sequence[TileInfo],
    options: TileOptions,
    earlier: Mapping[str, float],
    changed_areas: Sequence[Bounds],
) -> Rows:
    """The points' rows with the test heights sampled on the cluster (one task per tile)."""
    test_crs = CRS.from_wkt(tests[0].grid.crs)
    to_test = Transformer.from_crs(point_crs, test_crs, always_xy=True)
    xs, ys = (np.asarray(v) for v in to_test.transform(
        [p.x for p in data.points], [p.y for p in data.points]
    ))  # fmt: skip
    again = points_near(xs, ys, changed_areas, 2 * max(tests[0].grid.resolution))
    rows, by_tile = place_points(
        data.points, xs, ys, [t.bounds for t in tests], earlier=earlier, again=again
    )
    index = TileIndex(tests)
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
    return with_samples(rows, (s for part in client.gather(futures) for s in part))


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


def write_residuals(path: Path, rows: Rows) -> None:
    """checkpoint_residuals.csv: one line per row (RESIDUAL_COLUMNS)."""
    with open(path, "w", newline="", encoding="utf-8") as fh:
        writer = csv.writer(fh)
        writer.writerow(RESIDUAL_COLUMNS)
        writer.writerows(r.csv_row() for r in rows.values())
