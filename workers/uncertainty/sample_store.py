"""Tile error-model samples kept in results.zarr, so a re-check reuses the unchanged tiles'
samples instead of recomputing the tiles (I/O edge of workers/uncertainty).

Layout: ``results.zarr/error_samples/<tile id>/<part>/`` (part ``all``, or ``after`` for dh
after co-registration) holds one tile's :class:`TileErrorSample`: the arrays ``points`` (k x 6:
priority, x, y, dh, slope, curvature), ``joint_sums``, ``area_counts`` (areas x class code x
degree x curvature key, the area names in the attribute ``areas``), ``terrain_overview`` and the
binned summaries as in workers/outputs/summary_store.py (entries keyed ``(kind, bin)``, kind
``slope``, ``curvature`` or ``joint``); the attributes hold the CRS, pixel area, counts and the
sampling options (a sample is reused only under the same options).
"""

from __future__ import annotations

import dataclasses
import shutil
from collections.abc import Iterable
from pathlib import Path
from typing import Any, Literal

import numpy as np
from numpy.typing import NDArray

from demaudit.workers.outputs.folder import link_or_copy
from demaudit.workers.outputs.layout import AFTER_PART, ALL_PART, ERROR_SAMPLES_GROUP
from demaudit.workers.outputs.summary_store import open_store_group, read_entries, write_entries
from demaudit.workers.stats.summary import DhSummary
from demaudit.workers.uncertainty.accumulate import ErrorModelAccumulator
from demaudit.workers.uncertainty.sample import ErrorModelOptions, TileErrorSample

GROUP = ERROR_SAMPLES_GROUP
KINDS = ("slope", "curvature", "joint")


class ErrorSampleStore:
    """The ``error_samples`` group of one results.zarr (mode 'r' or 'a')."""

    def __init__(self, zarr_path: Path, *, mode: Literal["r", "a"] = "r") -> None:
        self.zarr_path = Path(zarr_path)
        self._parent: Any = open_store_group(zarr_path, GROUP, mode=mode)

    def write(
        self, tile_id: str, part: str, sample: TileErrorSample, options: ErrorModelOptions
    ) -> None:
        """Write (replace) one tile's sample."""
        entries = {
            (kind, str(k)): s
            for kind, bins in zip(KINDS, _bins_of(sample), strict=True)
            for k, s in bins.items()
        }
        parent = self._parent.require_group(tile_id)
        group = write_entries(parent, part, entries, _attributes(sample, options))
        points = np.column_stack(
            [sample.priority, sample.x, sample.y, sample.dh, sample.slope_deg, sample.curvature]
        )
        counts = np.stack(list(sample.counts.values())) if sample.counts else np.zeros((0,))
        terrain = sample.terrain_overview
        for name, data in (
            ("points", points),
            ("joint_sums", sample.joint_sums),
            ("area_counts", counts),
            ("terrain_overview", np.zeros((0,), np.float32) if terrain is None else terrain),
        ):
            group.create_array(name, data=data, chunks=tuple(max(n, 1) for n in data.shape))

    def read(self, tile_id: str, part: str) -> TileErrorSample:
        """One tile's sample (KeyError when not stored)."""
        group = self._parent[tile_id][part]
        entries, attrs = read_entries(group)
        bins: dict[str, dict[int, DhSummary]] = {kind: {} for kind in KINDS}
        for (kind, key), s in entries.items():
            bins[kind][int(key)] = s
        points = np.asarray(group["points"][...], dtype=np.float64).reshape(-1, 6)
        counts = np.asarray(group["area_counts"][...], dtype=np.int64)
        terrain = np.asarray(group["terrain_overview"][...], dtype=np.float32)
        return TileErrorSample(
            crs=attrs["crs"],
            pixel_area_m2=float(attrs["pixel_area_m2"]),
            slope_bins=bins["slope"],
            curvature_bins=bins["curvature"],
            joint_bins=bins["joint"],
            joint_sums=np.asarray(group["joint_sums"][...], dtype=np.float64),
            priority=points[:, 0].copy(),
            x=points[:, 1].copy(),
            y=points[:, 2].copy(),
            dh=points[:, 3].copy(),
            slope_deg=points[:, 4].copy(),
            curvature=points[:, 5].copy(),
            counts={area: counts[i] for i, area in enumerate(attrs["areas"])},
            stable=int(attrs["stable"]),
            outside_limits=int(attrs["outside_limits"]),
            terrain_overview=terrain if terrain.ndim == 3 else None,
        )

    def read_terrain(self, tile_id: str) -> NDArray[np.float32] | None:
        """A tile's terrain overview (part ``all``); None when not stored."""
        try:
            data = np.asarray(self._parent[tile_id][ALL_PART]["terrain_overview"][...], np.float32)
        except KeyError:
            return None
        return data if data.ndim == 3 else None

    def reusable(self, tile_id: str, options: ErrorModelOptions) -> bool:
        """Whether the tile's sample (part ``all``) is stored, taken under these options."""
        try:
            attrs = self._parent[tile_id][ALL_PART].attrs
        except KeyError:
            return False
        return attrs.get("options") == dataclasses.asdict(options)  # type: ignore[no-any-return]

    def parts(self, tile_id: str) -> list[str]:
        """The parts stored for a tile."""
        folder = self.zarr_path / GROUP / tile_id
        return [p for p in (ALL_PART, AFTER_PART) if (folder / p).is_dir()]

    def link_from(self, other: Path, tile_ids: Iterable[str]) -> None:
        """Bring tiles' stored samples over from another results.zarr (hard links where the
        file system allows, see workers/outputs/summary_store.py; copies elsewhere)."""
        for tile_id in tile_ids:
            source = Path(other) / GROUP / tile_id
            target = self.zarr_path / GROUP / tile_id
            if target.exists():
                shutil.rmtree(target)
            shutil.copytree(source, target, copy_function=link_or_copy)


def _bins_of(sample: TileErrorSample) -> tuple[dict[int, DhSummary], ...]:
    return sample.slope_bins, sample.curvature_bins, sample.joint_bins


def _attributes(sample: TileErrorSample, options: ErrorModelOptions) -> dict[str, Any]:
    return {
        "crs": sample.crs,
        "pixel_area_m2": sample.pixel_area_m2,
        "stable": sample.stable,
        "outside_limits": sample.outside_limits,
        "areas": list(sample.counts),
        "options": dataclasses.asdict(options),
    }


def not_reusable(
    baseline_zarr: Path, tile_ids: Iterable[str], options: ErrorModelOptions
) -> list[str]:
    """The tiles of tile_ids whose error-model sample the baseline does not hold under these
    options (all of them when it holds none)."""
    ids = list(tile_ids)
    try:
        store = ErrorSampleStore(baseline_zarr)
    except (KeyError, FileNotFoundError, OSError):
        return ids
    return [t for t in ids if not store.reusable(t, options)]


def record_samples(
    store: ErrorSampleStore | None,
    tile_id: str,
    samples: tuple[TileErrorSample | None, TileErrorSample | None],
    accumulators: list[ErrorModelAccumulator],
    options: ErrorModelOptions | None,
) -> None:
    """Add a tile's samples (of dh, and after co-registration) to the running merges and, with
    a store, keep them for later re-checks."""
    for part, sample, acc in zip((ALL_PART, AFTER_PART), samples, accumulators, strict=True):
        acc.add(sample)
        if store is not None and sample is not None and options is not None:
            store.write(tile_id, part, sample, options)


def carry_samples(
    store: ErrorSampleStore,
    baseline_zarr: Path,
    tile_ids: Iterable[str],
    accumulators: list[ErrorModelAccumulator],
) -> None:
    """Link kept tiles' samples over from the baseline and merge them, one tile at a time (the
    accumulators keep the same points whatever the order: the result equals a fresh run's)."""
    ids = list(tile_ids)
    store.link_from(baseline_zarr, ids)
    for tile_id in ids:
        for part in store.parts(tile_id):
            accumulators[0 if part == ALL_PART else 1].add(store.read(tile_id, part))
