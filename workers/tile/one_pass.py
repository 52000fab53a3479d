"""Every summary of one tile from one pass over its valid pixels (pure).

Each valid pixel gets one small integer key: which regions hold it (its membership pattern: a
pixel may lie in several regions), its land-cover class and its slope band. The values are binned
once and summarised per key (workers/tile/keyed_summary.py); the whole tile, each region and each
region x stratum is then a union of keys. The summaries are those of ``summarise(dh[mask])`` for
each mask (see tests/workers/test_tile_pass.py).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from demaudit.workers.stats.summary import DhSummary
from demaudit.workers.tile import kernels
from demaudit.workers.tile.keyed_summary import CellSummaries, summarise_cells, summarise_keyed
from demaudit.workers.tile.strata import (
    EXCLUDED_CODE,
    ClassInfo,
    StratumCells,
    class_codes,
    stratum_cells,
)
from demaudit.workers.tile.terrain import slope_bands

ALL = "*"  # key of the whole tile among area keys


@dataclass(frozen=True, eq=False)
class TileSummaries:
    """The summaries of one tile: ``areas`` maps ALL and each region id to its summary,
    ``strata`` each of them to stratum name -> summary; ``excluded`` counts the valid dh pixels
    dropped for an excluded land-cover class."""

    areas: dict[str, DhSummary]
    strata: dict[str, dict[str, DhSummary]]
    excluded: int


def summarise_pixels(
    dh: NDArray[np.floating],
    *,
    reference: NDArray[np.floating],
    landcover: NDArray[np.floating] | None,
    region_masks: Mapping[str, NDArray[np.bool_]],
    classes: Sequence[ClassInfo],
    slope_edges: Sequence[float],
    pixel_size_m: tuple[float, float],
) -> TileSummaries:
    """Summaries of dh (metres; NaN = no value) for the tile, each region (masks on the tile's
    grid) and each area x stratum (land-cover class and group from ``landcover``, slope band of
    ``reference``, both on the tile's grid). Pixels of excluded classes leave every summary."""
    layout = stratum_cells(
        with_landcover=landcover is not None, classes=classes, slope_edges=slope_edges
    )
    px, py = pixel_size_m
    bands = slope_bands(
        reference, slope_edges, pixel_size_x_m=px, pixel_size_y_m=py, in_float64=True
    )
    codes = None if landcover is None else class_codes(landcover, classes, size=dh.size)
    patterns, members = grid_patterns(region_masks) if kernels.AVAILABLE else (None, [])
    fused = (
        None
        if not members
        else summarise_keyed(
            dh,
            bands=bands,
            codes=codes,
            patterns=patterns,
            n_band_codes=layout.n_bands + 1,
            n_cells=layout.n_cells,
            n_patterns=len(members),
        )
    )
    if fused is not None:
        per_key, dropped = fused
    else:
        per_key, members, dropped = _summarise_in_numpy(dh, bands, codes, region_masks, layout)
    areas: dict[str, DhSummary] = {}
    strata: dict[str, dict[str, DhSummary]] = {}
    n_cells = layout.n_cells
    per_pattern = per_key.count.reshape(len(members), n_cells)
    occupied = [bool(per_pattern[p].any()) for p in range(len(members))]
    everywhere = [p for p in range(len(members)) if occupied[p]]
    for area in (ALL, *region_masks):
        held = [p for p, inside in enumerate(members) if area == ALL or area in inside]
        if area != ALL and [p for p in held if occupied[p]] == everywhere:
            # the region holds every pixel of the tile: the same cells give the same summaries,
            # so it shares the tile's (one object each: sent and stored once)
            areas[area], strata[area] = areas[ALL], dict(strata[ALL])
            continue
        of_area = per_key.grouped([[p * n_cells + c for p in held] for c in range(n_cells)])
        areas[area] = of_area.union(range(n_cells))
        strata[area] = {name: of_area.union(cells) for name, cells in layout.strata.items()}
    return TileSummaries(areas, strata, dropped)


def _summarise_in_numpy(
    dh: NDArray[np.floating],
    bands: NDArray[np.uint8],
    codes: NDArray[np.uint8] | None,
    region_masks: Mapping[str, NDArray[np.bool_]],
    layout: StratumCells,
) -> tuple[CellSummaries, list[frozenset[str]], int]:
    """The cells' summaries with the keys built in numpy (no compiled loops, or more counters
    than fit at once): per-key summaries, the membership patterns and the excluded count."""
    cells: NDArray[np.integer] = bands
    excluded = None
    if codes is not None:
        excluded = codes == EXCLUDED_CODE
        cells = codes.astype(np.int32) * (layout.n_bands + 1) + bands
    dropped = 0 if excluded is None else int(np.count_nonzero(excluded & np.isfinite(dh)))
    if len(region_masks) <= _DIRECT_REGIONS:
        # keys on the grid, -1 for excluded pixels; NaN dh and those are left out by the sweep
        keys, members = _keys_on_grid(cells, region_masks, layout.n_cells, excluded)
        per_key = summarise_cells(dh.ravel(), keys.ravel(), len(members) * layout.n_cells)
        return per_key, members, dropped
    valid = np.isfinite(dh)
    if excluded is not None:
        valid &= ~excluded
    (flat,) = np.nonzero(valid.ravel())
    del valid
    patterns, members = membership_patterns(flat, region_masks)
    patterns *= layout.n_cells
    patterns += cells.ravel()[flat]
    per_key = summarise_cells(dh.ravel()[flat], patterns, len(members) * layout.n_cells)
    return per_key, members, dropped


def grid_patterns(
    region_masks: Mapping[str, NDArray[np.bool_]],
) -> tuple[NDArray[np.int32] | int | None, list[frozenset[str]]]:
    """Each pixel's membership pattern on the grid (None without regions; one int when every
    pixel has the same: the tile lies inside or outside each region, the common case) and the
    regions of each pattern: up to _DIRECT_REGIONS regions their bits (every pattern numbered),
    more regions numbered as membership_patterns numbers them (those that occur on the grid)."""
    ids = list(region_masks)
    if not ids:
        return None, [frozenset()]
    if len(ids) <= _DIRECT_REGIONS:
        members = [
            frozenset(r for bit, r in enumerate(ids) if (p >> bit) & 1)
            for p in range(1 << len(ids))
        ]
        inside = [bool(region_masks[r].all()) for r in ids]
        if all(inside[bit] or not region_masks[r].any() for bit, r in enumerate(ids)):
            return sum(1 << bit for bit in range(len(ids)) if inside[bit]), members
        pattern = np.zeros(next(iter(region_masks.values())).shape, dtype=np.int32)
        for bit, region_id in enumerate(ids):
            np.add(pattern, 1 << bit, out=pattern, where=region_masks[region_id])
        return pattern, members
    shape = next(iter(region_masks.values())).shape
    every = np.arange(int(np.prod(shape)), dtype=np.intp)
    numbered, members = membership_patterns(every, region_masks)
    return numbered.astype(np.int32).reshape(shape), members


def membership_patterns(
    flat: NDArray[np.intp], region_masks: Mapping[str, NDArray[np.bool_]]
) -> tuple[NDArray[np.intp], list[frozenset[str]]]:
    """For the pixels at flat indices: the number of their membership pattern, and for each
    pattern the regions it lies in (only patterns that occur are numbered).

    Up to 16 regions at a time are packed as bits on the tile's grid, gathered once and
    renumbered; more regions take further rounds.
    """
    pattern = np.zeros(flat.size, dtype=np.intp)
    members: list[frozenset[str]] = [frozenset()]
    ids = list(region_masks)
    while ids:
        room = _TABLE_BITS - (len(members) - 1).bit_length()  # renumbering table of 2^20
        take = max(1, min(_BITS_PER_ROUND, room))
        group, ids = ids[:take], ids[take:]
        bits = np.zeros(next(iter(region_masks.values())).shape, dtype=np.uint16)
        for bit, region_id in enumerate(group):
            inside = region_masks[region_id].astype(np.uint16)
            inside <<= bit
            bits |= inside
        code = pattern << len(group)
        code += bits.ravel()[flat]
        present = np.flatnonzero(np.bincount(code, minlength=len(members) << len(group)))
        renumber = np.zeros(len(members) << len(group), dtype=np.intp)
        renumber[present] = np.arange(present.size)
        pattern = renumber[code]
        members = [
            members[c >> len(group)] | {r for bit, r in enumerate(group) if (c >> bit) & 1}
            for c in present.tolist()
        ]
    return pattern, members


_BITS_PER_ROUND = 16
_TABLE_BITS = 20


def _keys_on_grid(
    cells: NDArray[np.integer],
    region_masks: Mapping[str, NDArray[np.bool_]],
    n_cells: int,
    excluded: NDArray[np.bool_] | None,
) -> tuple[NDArray[np.int32], list[frozenset[str]]]:
    """Keys pattern * n_cells + cell on the tile's grid (-1 where excluded); every membership
    pattern of the few regions is numbered (the bits of the pattern number)."""
    ids = list(region_masks)
    key = cells.astype(np.int32)
    for bit, region_id in enumerate(ids):
        np.add(key, (1 << bit) * n_cells, out=key, where=region_masks[region_id])
    if excluded is not None:
        key[excluded] = -1
    members = [
        frozenset(r for bit, r in enumerate(ids) if (p >> bit) & 1) for p in range(1 << len(ids))
    ]
    return key, members


_DIRECT_REGIONS = 3  # up to 2^3 patterns, each numbered whether it occurs or not
