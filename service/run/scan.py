"""The scan phase of a job: every tile's header (and content fingerprint) read on the cluster,
the reference indexed, overlap, geoid grids and regions checked before the first tile runs."""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field, replace
from functools import partial
from pathlib import Path
from typing import Any

import numpy as np
from distributed import Client
from pyproj import CRS, Transformer

from demaudit.service.run.checkpoints import read_job_checkpoints
from demaudit.service.run.coregistration import TileInputs
from demaudit.workers.checkpoints.points import CheckpointFile
from demaudit.workers.errors import EmptyOverlapError, TileReadError
from demaudit.workers.inputs import regions as region_ops
from demaudit.workers.inputs.catalog import (
    Footprint,
    Known,
    Overlap,
    ScanFailure,
    TileInfo,
    call_each,
    file_fingerprint,
    overlap_cautions,
    overlap_sources,
    overlap_sources_of,
    scan_landcover_tile,
    scan_tile,
    tile_overlaps,
    unchanged,
    unique_tile_ids,
)
from demaudit.workers.inputs.catalog_file import catalog_document
from demaudit.workers.inputs.confine import Roots, stamp_of
from demaudit.workers.inputs.regions import Region
from demaudit.workers.inputs.tile_index import TileIndex
from demaudit.workers.outputs.tile_records import TileRecord, coverage_cautions
from demaudit.workers.outputs.writers import OverviewLayout, overview_layout
from demaudit.workers.spec import ELLIPSOIDAL, ResolvedJob
from demaudit.workers.tile.datum import geoid_undulation
from demaudit.workers.tile.task import TileOptions


@dataclass(frozen=True)
class Inputs:
    """The job's small input files, read (and so checked) before any tile is dispatched."""

    regions: list[Region]
    checkpoints: CheckpointFile | None = None


def read_inputs(job: ResolvedJob) -> Inputs:
    """Read the region and checkpoint files; SpecError (or MissingCRSError) naming the file and
    field when one cannot be used."""
    checkpoints = read_job_checkpoints(job) if job.spec.checkpoints is not None else None
    return Inputs(load_regions(job), checkpoints)


@dataclass(frozen=True)
class Catalog:
    """What the job knows before dispatch: readable tiles, candidates, regions."""

    tests: list[TileInfo]
    test_failures: list[ScanFailure]
    reference_failures: list[dict[str, str]]
    candidates: dict[str, list[TileInfo]]
    cover_index: TileIndex
    regions: list[Region]
    regions_by_crs: dict[str, list[Region]]

    references: tuple[TileInfo, ...] = ()
    landcover: tuple[TileInfo, ...] = ()
    overlaps: dict[str, Overlap] = field(default_factory=dict)  # see catalog.tile_overlaps

    def covered_of(self, tile: TileInfo) -> tuple[Footprint, ...]:
        """Footprints of earlier-listed test tiles overlapping this one (their pixels count)."""
        found = self.overlaps.get(tile.tile_id)
        return found.covered if found else ()

    @property
    def by_id(self) -> dict[str, TileInfo]:
        return {t.tile_id: t for t in self.tests}

    def tile_inputs(self) -> TileInputs:
        """What the tile tasks need besides their tile."""
        return TileInputs(self.candidates, self.landcover_of, self.regions_by_crs, self.covered_of)

    def landcover_of(self, tile: TileInfo) -> list[TileInfo]:
        return self.cover_index.overlapping(tile.grid)

    def sources_of(self, tile: TileInfo) -> list[str]:
        """Ids (prefixed by kind) of the reference and land-cover tiles a test tile overlaps."""
        return (
            [f"reference:{t.tile_id}" for t in self.candidates.get(tile.tile_id, [])]
            + [f"landcover:{t.tile_id}" for t in self.landcover_of(tile)]
            + overlap_sources_of(self.overlaps, tile.tile_id)
        )

    def document(self, *, anchors: Sequence[str]) -> dict[str, Any]:
        """catalog.json: every tile scanned, so a re-check need not open unchanged files (paths
        relative to the anchors, ResolvedJob.anchors: workers/inputs/catalog_file.py)."""
        tiles = [*self.tests, *self.references, *self.landcover]
        return catalog_document(tiles, anchors=anchors)

    def source_fingerprints(self) -> dict[str, str]:
        """Fingerprints of every reference and land-cover tile, ids prefixed by kind."""
        return (
            {f"reference:{t.tile_id}": t.fingerprint for t in self.references}
            | {f"landcover:{t.tile_id}": t.fingerprint for t in self.landcover}
            | overlap_sources(self.overlaps)
        )


@dataclass(frozen=True)
class Scan:
    """The scan phase's outcome: the catalog, the tile options of the spec, the fingerprints
    of every source tile, the region ids, the dh overview's layout (None when the test tiles
    are not on one grid) and the region file's SHA-256."""

    catalog: Catalog
    options: TileOptions
    sources: dict[str, str]
    region_ids: list[str]
    layout: OverviewLayout | None
    region_fingerprint: str | None

    def cautions(self, records: Sequence[TileRecord]) -> list[str]:
        """Cautions on test tiles left out, regions, overlapping test tiles, the overview."""
        catalog = self.catalog
        return (
            coverage_cautions(records)
            + region_ops.region_cautions(catalog.regions)
            + overlap_cautions(catalog.overlaps)
            + ([] if self.layout else ["no dh overview: the test tiles are not on one grid"])
        )


def scan_job(
    mapper: Mapper,
    job: ResolvedJob,
    options: TileOptions,
    inputs: Inputs,
    *,
    known: Mapping[str, TileInfo],
    headers_checked: bool,
) -> Scan:
    """Scan the job's tiles (see scan_catalog) and describe what the later phases need."""
    catalog = scan_catalog(
        mapper, job, options, known, inputs.regions, headers_checked=headers_checked
    )
    return Scan(
        catalog=catalog,
        options=options,
        sources=catalog.source_fingerprints(),
        region_ids=[r.region_id for r in catalog.regions],
        layout=overview_layout(catalog.tests, factor=job.spec.options.overview_factor),
        region_fingerprint=region_fingerprint(job),
    )


def region_fingerprint(job: ResolvedJob) -> str | None:
    """SHA-256 of the region file (None without regions): editing it changes every region."""
    if job.region_file is None:
        return None
    return file_fingerprint(job.region_file, roots=job.data_roots)


#: map(function, *argument lists) -> results in order: on the cluster, or in local threads.
Mapper = Callable[..., list[Any]]


def dask_map(client: Client) -> Mapper:
    """A Mapper on the cluster: the calls go in batches (batch_size), one task each, so that a
    task's fixed cost (scheduling, a round trip, about as long as one tile's header and hash)
    is paid a few times per worker instead of once per file."""

    def mapped(function: Callable[..., Any], *arguments: Sequence[Any]) -> list[Any]:
        calls = list(zip(*arguments, strict=True))
        size = batch_size(len(calls), workers=max(1, sum(client.nthreads().values())))
        batches = [calls[i : i + size] for i in range(0, len(calls), size)]
        futures = client.map(call_each, [function] * len(batches), batches, pure=False)
        return [out for batch in client.gather(futures) for out in batch]

    return mapped


def batch_size(calls: int, *, workers: int, per_worker: int = 4, largest: int = 16) -> int:
    """Calls per task: about per_worker tasks per worker thread (so that the work still
    spreads evenly), never more than ``largest`` calls in one task."""
    return max(1, min(largest, -(-calls // (workers * per_worker))))


def scan_catalog(
    mapper: Mapper,
    job: ResolvedJob,
    options: TileOptions,
    known: Mapping[str, TileInfo],
    region_list: list[Region],
    *,
    headers_checked: bool = False,
) -> Catalog:
    """Scan every tile (with mapper), index the reference, check overlap, geoid and regions.

    known: an earlier scan; with headers_checked its unchanged tiles are not opened again."""
    reuse = known if headers_checked else {}
    roots = job.data_roots
    test_tiles, test_failures = _scan(mapper, job.test_tiles, known, reuse, roots=roots)
    ref_tiles, ref_failures = _scan(mapper, job.reference_tiles, known, reuse, roots=roots)
    cover_tiles, cover_failures = _scan(
        mapper, job.landcover_tiles, known, reuse, scan=scan_landcover_tile, roots=roots
    )
    if not test_tiles:
        raise TileReadError("no test tile could be read: " + _reasons(test_failures))
    if job.reference_tiles and not ref_tiles:
        raise TileReadError("no reference tile could be read: " + _reasons(ref_failures))
    _check_geoid(options, test_tiles[0])
    index = TileIndex(ref_tiles)
    candidates = {t.tile_id: index.overlapping(t.grid) for t in test_tiles}
    if job.reference_tiles and not any(candidates.values()):
        raise EmptyOverlapError("the test and reference tiles do not overlap anywhere")
    return Catalog(
        tests=test_tiles,
        test_failures=test_failures,
        reference_failures=[
            {"tile": f.tile_id, "reason": f.reason} for f in [*ref_failures, *cover_failures]
        ],
        candidates=candidates,
        cover_index=TileIndex(cover_tiles),
        regions=region_list,
        regions_by_crs=_regions_by_crs(region_list, test_tiles),
        references=tuple(ref_tiles),
        landcover=tuple(cover_tiles),
        overlaps=tile_overlaps(test_tiles),
    )


def local_map(function: Callable[..., Any], *arguments: Sequence[Any]) -> list[Any]:
    """A Mapper on local threads for the header scan of validate_job (hashing skipped)."""
    if function in (scan_tile, scan_landcover_tile):
        function = partial(_header_only, function)
    with ThreadPoolExecutor(max_workers=4) as pool:
        return list(pool.map(function, *arguments))


def _header_only(
    scan: Callable[..., TileInfo | ScanFailure],
    path: str,
    known: Known | None = None,
    roots: Roots = None,
) -> TileInfo | ScanFailure:
    """A tile scan without hashing the content (the fingerprint is left empty)."""
    try:
        stat = Path(path).stat()
    except OSError:
        return scan(path, None, roots)  # reports the unreadable file
    return scan(path, (stamp_of(stat), ""), roots)


def _scan(
    mapper: Mapper,
    paths: Sequence[Path],
    known: Mapping[str, TileInfo],
    reuse: Mapping[str, TileInfo],
    scan: Callable[..., TileInfo | ScanFailure] = scan_tile,
    roots: Roots = None,
) -> tuple[list[TileInfo], list[ScanFailure]]:
    """Scan tiles on the cluster; a tile in ``reuse`` with the same stamp (size, mtime, ctime,
    inode: confine.Stamp) is taken from it without opening the file; one in ``known`` (an
    earlier scan) with the same stamp is opened for its header but not hashed again. Every tile's
    reads are confined to roots (workers/inputs/confine.py)."""
    reused = {
        str(p): replace(reuse[str(p)], roots=roots)
        for p in paths
        if str(p) in reuse and unchanged(reuse[str(p)], p)
    }
    names = [str(p) for p in paths if str(p) not in reused]
    hints: list[Known | None] = [
        (known[n].stamp, known[n].fingerprint) if n in known else None for n in names
    ]
    scanned = mapper(scan, names, hints, [roots] * len(names)) if names else []
    by_path = reused | {s.path: s for s in scanned}
    ordered = unique_tile_ids([by_path[str(p)] for p in paths])  # re-deliveries of one name
    ok = [s for s in ordered if isinstance(s, TileInfo)]
    failed = [s for s in ordered if isinstance(s, ScanFailure)]
    return ok, failed


def _reasons(failures: Sequence[ScanFailure]) -> str:
    return "; ".join(f.reason for f in failures[:5]) + (" ..." if len(failures) > 5 else "")


def _check_geoid(options: TileOptions, sample: TileInfo) -> None:
    """Fail the job before dispatch when a needed geoid grid is missing (GeoidGridError)."""
    x, y = sample.grid.pixel_centres(np.array([0.0]), np.array([0.0]))
    lon, lat = Transformer.from_crs(
        CRS.from_wkt(sample.grid.crs), "EPSG:4326", always_xy=True
    ).transform(x, y)
    for vertical in {options.test_vertical_crs, options.reference_vertical_crs} - {ELLIPSOIDAL}:
        geoid_undulation(lon, lat, vertical_crs=vertical, grid_dirs=options.grid_dirs)


def load_regions(job: ResolvedJob) -> list[Region]:
    if job.region_file is None or job.spec.region is None:
        return []
    return region_ops.read_regions(
        job.region_file, id_property=job.spec.region.id_property, roots=job.data_roots
    )


def _regions_by_crs(
    regions: Sequence[Region], tiles: Sequence[TileInfo]
) -> dict[str, list[Region]]:
    """The regions reprojected into each test CRS; EmptyOverlapError when none touches a tile."""
    if not regions:
        return {}
    by_crs = {crs: region_ops.to_crs(regions, crs) for crs in {t.grid.crs for t in tiles}}
    if not any(region_ops.clip_to(by_crs[t.grid.crs], t.bounds) for t in tiles):
        raise EmptyOverlapError(
            f"region.file: none of the {len(regions)} regions overlaps the test tiles "
            "(check the file's CRS and extent)"
        )
    return by_crs
