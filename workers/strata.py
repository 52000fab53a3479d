"""Strata: land-cover classes, their groups and slope bands, as pixel masks (pure).

Slope is taken from the reference on the test grid (the reference is the better terrain model);
see workers/terrain.py.
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
