"""Incremental re-check (pure): which tiles must be recomputed against a baseline run, and how
each changed tile and region compares with it.

A test tile is recomputed when it is new, when its content fingerprint changed, or when any
reference or land-cover tile it overlaps (now or in the baseline) is new, changed or removed.
Everything else is merged from the baseline's stored tile summaries, so the result equals a full
run on the same data.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

#: Baseline tile statuses that may be carried over when nothing they depend on changed.
REUSABLE = ("ok", "no_reference")


@dataclass(frozen=True)
class Thresholds:
    """When a change counts as a regression: NMAD worse by more than ``nmad_worse_fraction`` of
    its baseline value or by more than ``nmad_worse_m``; the median moved away from zero by more
    than ``median_moved_m``."""

    nmad_worse_fraction: float = 0.10
    nmad_worse_m: float = 0.05
    median_moved_m: float = 0.05


@dataclass(frozen=True)
class ChangePlan:
    """What a re-check does with each test tile (ids) and why."""

    recompute: dict[str, str] = field(default_factory=dict)  # tile id -> reason
    reuse: tuple[str, ...] = ()
    added: tuple[str, ...] = ()
    removed: tuple[str, ...] = ()


def plan(
    *,
    baseline_tiles: Mapping[str, Mapping[str, Any]],
    baseline_sources: Mapping[str, str],
    current_tiles: Mapping[str, str],
    current_sources: Mapping[str, str],
    overlaps: Mapping[str, Sequence[str]],
) -> ChangePlan:
    """Decide per test tile.

    baseline_tiles: tile id -> its baseline record (``fingerprint``, ``status``, ``sources``: the
    reference and land-cover tile ids it used); baseline_sources / current_sources: source tile
    id -> fingerprint (reference and land cover, ids prefixed by kind); current_tiles: test tile
    id -> fingerprint; overlaps: test tile id -> source ids it overlaps now.
    """
    changed_sources = {
        s
        for s in set(baseline_sources) | set(current_sources)
        if baseline_sources.get(s) != current_sources.get(s)
    }
    recompute: dict[str, str] = {}
    reuse: list[str] = []
    for tile_id, fingerprint in sorted(current_tiles.items()):
        before = baseline_tiles.get(tile_id)
        touched = sorted(
            changed_sources
            & (set(overlaps.get(tile_id, ())) | set((before or {}).get("sources", ())))
        )
        if before is None:
            recompute[tile_id] = "new test tile"
        elif before.get("status") not in REUSABLE:
            recompute[tile_id] = f"baseline status was {before.get('status')}"
        elif before.get("fingerprint") != fingerprint:
            recompute[tile_id] = "test tile content changed"
        elif touched:
            recompute[tile_id] = "source tile(s) changed: " + ", ".join(touched[:5])
        else:
            reuse.append(tile_id)
    added = tuple(t for t in current_tiles if t not in baseline_tiles)
    removed = tuple(sorted(t for t in baseline_tiles if t not in current_tiles))
    return ChangePlan(recompute, tuple(reuse), added, removed)


def compare(
    before: Mapping[str, Any] | None, after: Mapping[str, Any] | None, limits: Thresholds
) -> dict[str, Any]:
    """Verdict on one tile's or region's statistics: 'improved', 'regressed' (with flags),
    'unchanged', 'new' or 'removed'."""
    if not before or not before.get("count"):
        return {"verdict": "new", "before": before, "after": after, "flags": []}
    if not after or not after.get("count"):
        return {"verdict": "removed", "before": before, "after": after, "flags": []}
    d_nmad = after["nmad"] - before["nmad"]
    d_bias = abs(after["median"]) - abs(before["median"])
    worse = d_nmad > limits.nmad_worse_fraction * before["nmad"] or d_nmad > limits.nmad_worse_m
    better = -d_nmad > limits.nmad_worse_fraction * before["nmad"] or -d_nmad > limits.nmad_worse_m
    flags = []
    if worse:
        flags.append(f"nmad worse by {d_nmad:.3f} m ({d_nmad / before['nmad']:+.0%})")
    if d_bias > limits.median_moved_m:
        flags.append(f"median moved {d_bias:.3f} m away from zero")
    if flags:
        verdict = "regressed"
    elif better or -d_bias > limits.median_moved_m:
        verdict = "improved"
    else:
        verdict = "unchanged"
    return {"verdict": verdict, "flags": flags, "before": _brief(before), "after": _brief(after)}


def lost_grades(
    before: Sequence[Mapping[str, Any]], after: Sequence[Mapping[str, Any]]
) -> list[dict[str, Any]]:
    """Standards met in the baseline and not met now."""
    was = {g["standard"]: g.get("met") for g in before}
    return [
        {"standard": g["standard"], "flag": "grade lost"}
        for g in after
        if was.get(g["standard"]) is True and g.get("met") is False
    ]


def _brief(stats: Mapping[str, Any]) -> dict[str, Any]:
    keys = ("count", "median", "nmad", "rmse", "q95_abs")
    return {k: stats.get(k) for k in keys}
