"""Strata: land-cover classes, their groups and slope bands, as pixel masks (pure).

Slope is taken from the reference on the test grid (the reference is the better terrain model);
see workers/tile/terrain.py.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

EXCLUDED = "excluded"


@dataclass(frozen=True)
class ClassInfo:
    """A land-cover class value, its name and group (non_vegetated, vegetated, excluded)."""

    value: int
    name: str
    group: str


def slope_band_labels(edges: Sequence[float]) -> list[str]:
    """Labels of slope bands with lower edges ``edges``: '0-5', '5-15', ..., '45+'."""
    labels = [f"{lo:g}-{hi:g}" for lo, hi in zip(edges[:-1], edges[1:], strict=True)]
    return [*labels, f"{edges[-1]:g}+"]


def stratum_masks(
    *,
    landcover: NDArray[np.float64] | None,
    classes: Sequence[ClassInfo],
    slope: NDArray[np.float64],
    slope_edges: Sequence[float],
) -> dict[str, NDArray[np.bool_]]:
    """Masks keyed 'landcover:<name>', 'cover_group:<group>', 'slope_deg:<band>' and, with land
    cover, 'cover_group:<group>/slope_deg:<band>' (accuracy by slope on open ground, say).

    Excluded classes get no stratum of their own; pixels with no class count in no class stratum.
    """
    masks: dict[str, NDArray[np.bool_]] = {}
    groups: dict[str, NDArray[np.bool_]] = {}
    if landcover is not None:
        for info in classes:
            if info.group == EXCLUDED:
                continue
            mask = landcover == info.value
            masks[f"landcover:{info.name}"] = mask
            groups[info.group] = groups.get(info.group, np.zeros(mask.shape, bool)) | mask
        masks.update({f"cover_group:{g}": m for g, m in sorted(groups.items())})
    bands = np.digitize(slope, slope_edges) - 1  # NaN slope -> len(edges) - 1 .. guarded below
    finite = np.isfinite(slope)
    for band, label in enumerate(slope_band_labels(slope_edges)):
        in_band = finite & (bands == band)
        masks[f"slope_deg:{label}"] = in_band
        for group, group_mask in sorted(groups.items()):
            masks[f"cover_group:{group}/slope_deg:{label}"] = group_mask & in_band
    return masks


def excluded_mask(
    landcover: NDArray[np.float64] | None, classes: Sequence[ClassInfo]
) -> NDArray[np.bool_] | None:
    """Pixels of excluded classes (they leave every statistic); None without land cover."""
    if landcover is None:
        return None
    values = [c.value for c in classes if c.group == EXCLUDED]
    return np.isin(landcover, values)


def classes_from_spec(classes: Mapping[int, object]) -> tuple[ClassInfo, ...]:
    """ClassInfo values from the spec's mapping value -> {name, group}."""
    return tuple(
        ClassInfo(int(v), str(c.name), str(c.group))  # type: ignore[attr-defined]
        for v, c in sorted(classes.items())
    )


@dataclass(frozen=True)
class StratumCells:
    """Strata as sets of cells: a pixel's cell is ``class_code * (n_bands + 1) + band_code``.

    Class codes are 0..n_classes-1 for the non-excluded classes in order, n_classes for a pixel
    with no (listed) class; band codes 0..n_bands-1, n_bands for no band (slope NaN or below the
    first edge). ``strata`` maps each stratum name of :func:`stratum_masks`, in its order, to the
    cells it holds; a pixel lies in a stratum when its cell does.
    """

    n_classes: int
    n_bands: int
    strata: dict[str, tuple[int, ...]]

    @property
    def n_cells(self) -> int:
        return (self.n_classes + 1) * (self.n_bands + 1)

    def cell(
        self, class_code: NDArray[np.integer], band_code: NDArray[np.integer]
    ) -> NDArray[np.intp]:
        """The cell of each pixel from its class and band codes."""
        cells = class_code.astype(np.intp)
        cells *= self.n_bands + 1
        cells += band_code
        return cells


def stratum_cells(
    *, with_landcover: bool, classes: Sequence[ClassInfo], slope_edges: Sequence[float]
) -> StratumCells:
    """The strata of :func:`stratum_masks` (same names, same order) as sets of cells."""
    kept = [c for c in classes if c.group != EXCLUDED] if with_landcover else []
    n_classes, n_bands = len(kept), len(slope_edges)
    every_class = range(n_classes + 1)
    every_band = range(n_bands + 1)

    def cells(class_codes: Sequence[int], band_codes: Sequence[int]) -> tuple[int, ...]:
        return tuple(c * (n_bands + 1) + b for c in class_codes for b in band_codes)

    strata: dict[str, tuple[int, ...]] = {}
    groups: dict[str, list[int]] = {}
    for code, info in enumerate(kept):
        strata[f"landcover:{info.name}"] = cells([code], every_band)
        groups.setdefault(info.group, []).append(code)
    strata.update({f"cover_group:{g}": cells(groups[g], every_band) for g in sorted(groups)})
    for band, label in enumerate(slope_band_labels(slope_edges)):
        strata[f"slope_deg:{label}"] = cells(every_class, [band])
        for group in sorted(groups):
            strata[f"cover_group:{group}/slope_deg:{label}"] = cells(groups[group], [band])
    return StratumCells(n_classes, n_bands, strata)


EXCLUDED_CODE = 255  # class code of an excluded class's pixel (see class_codes)


def class_codes(
    landcover: NDArray[np.floating] | None, classes: Sequence[ClassInfo], *, size: int
) -> NDArray[np.uint8]:
    """Class code of each land-cover value (see StratumCells): the position of its class among the
    non-excluded classes, EXCLUDED_CODE for an excluded class, or the number of non-excluded
    classes when it has none (NaN or unlisted value). Without land cover, every one of ``size``
    pixels has code 0 (= no class, as there are none). The codes keep landcover's shape.
    """
    kept = [c for c in classes if c.group != EXCLUDED]
    if landcover is None:
        return np.zeros(size, dtype=np.uint8)
    if len(kept) >= EXCLUDED_CODE:
        raise ValueError(f"at most {EXCLUDED_CODE - 1} land-cover classes are supported")
    code_of = {c.value: code for code, c in enumerate(kept)}
    code_of |= {c.value: EXCLUDED_CODE for c in classes if c.group == EXCLUDED}
    if not code_of:
        return np.full(landcover.shape, len(kept), dtype=np.uint8)
    lo, hi = min(code_of), max(code_of)
    if hi - lo < 65_536:
        codes = _codes_by_table(landcover, code_of, lo, hi, none=len(kept))
        if codes is not None:
            return codes
    codes = np.full(landcover.shape, len(kept), dtype=np.uint8)
    for value, code in code_of.items():
        codes[landcover == value] = code
    return codes


def _codes_by_table(
    landcover: NDArray[np.floating], code_of: dict[int, int], lo: int, hi: int, *, none: int
) -> NDArray[np.uint8] | None:
    """class_codes by one table look-up; None when landcover holds a non-integer value."""
    shifted = np.subtract(landcover, lo - 1, dtype=np.float64)  # lo..hi become 1..hi-lo+1
    np.fmax(shifted, 0.0, out=shifted)  # NaN and anything below go to 0 (no class)
    np.minimum(shifted, hi - lo + 2, out=shifted)  # anything above to hi-lo+2 (no class)
    if not np.array_equal(np.floor(shifted), shifted):
        return None
    table = np.full(hi - lo + 3, none, dtype=np.uint8)
    for value, code in code_of.items():
        table[value - lo + 1] = code
    return table[shifted.astype(np.intp)]
