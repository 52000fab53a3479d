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


#: Changes within this many combined standard errors are noise (two-sided 95 %).
NOISE_Z = 1.959964


def compare(
    before: Mapping[str, Any] | None,
    after: Mapping[str, Any] | None,
    limits: Thresholds,
    *,
    uncertainty_before: Mapping[str, Any] | None = None,
    uncertainty_after: Mapping[str, Any] | None = None,
) -> dict[str, Any]:
    """Verdict on one tile's or region's statistics: 'improved', 'regressed' (with flags),
    'unchanged', 'within_noise', 'new' or 'removed'.

    With both uncertainties (an area's ``uncertainty`` from workers/uncertainty/error_model.py), a
    change of
    the median or NMAD smaller than 1.96 x sqrt(se_before^2 + se_after^2) is noise whatever the
    fixed thresholds say: a verdict resting only on such changes becomes 'within_noise' (its
    flags move to ``noise``)."""
    if not before or not before.get("count"):
        return {"verdict": "new", "before": before, "after": after, "flags": []}
    if not after or not after.get("count"):
        return {"verdict": "removed", "before": before, "after": after, "flags": []}
    d_nmad = after["nmad"] - before["nmad"]
    d_bias = abs(after["median"]) - abs(before["median"])
    nmad_noise = _noise(uncertainty_before, uncertainty_after, "nmad_se_m")
    median_noise = _noise(uncertainty_before, uncertainty_after, "median_se_m")
    nmad_is_noise = nmad_noise is not None and abs(d_nmad) <= nmad_noise
    median_is_noise = (
        median_noise is not None and abs(after["median"] - before["median"]) <= median_noise
    )
    worse = d_nmad > limits.nmad_worse_fraction * before["nmad"] or d_nmad > limits.nmad_worse_m
    better = -d_nmad > limits.nmad_worse_fraction * before["nmad"] or -d_nmad > limits.nmad_worse_m
    flags: list[str] = []
    noise: list[str] = []
    if worse:
        flag = f"nmad worse by {d_nmad:.3f} m ({d_nmad / before['nmad']:+.0%})"
        (noise if nmad_is_noise else flags).append(flag)
    if d_bias > limits.median_moved_m:
        flag = f"median moved {d_bias:.3f} m away from zero"
        (noise if median_is_noise else flags).append(flag)
    improved = (better and not nmad_is_noise) or (
        -d_bias > limits.median_moved_m and not median_is_noise
    )
    if flags:
        verdict = "regressed"
    elif improved:
        verdict = "improved"
    elif noise or (better and nmad_is_noise) or (-d_bias > limits.median_moved_m):
        verdict = "within_noise"
    else:
        verdict = "unchanged"
    out = {"verdict": verdict, "flags": flags, "before": _brief(before), "after": _brief(after)}
    if nmad_noise is not None or median_noise is not None:
        out["noise"] = noise
        out["noise_m"] = {"median": median_noise, "nmad": nmad_noise}
    return out


def _noise(
    before: Mapping[str, Any] | None, after: Mapping[str, Any] | None, key: str
) -> float | None:
    """1.96 x sqrt(se_before^2 + se_after^2) of one statistic, None unless both are known."""
    a = (before or {}).get(key)
    b = (after or {}).get(key)
    if a is None or b is None:
        return None
    return float(NOISE_Z * (a * a + b * b) ** 0.5)


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
