"""What a re-check takes from its baseline's summary document (pure, no files, no cluster)."""

from __future__ import annotations

from demaudit.workers.recheck.baseline import (
    change_plan,
    change_report,
    known_shifts,
    spec_changes,
    tile_records,
)
from demaudit.workers.recheck.plan import ChangePlan, Thresholds

SPEC = {"test": {"tiles": "t/*.tif"}, "options": {"resampling": "bilinear"}, "grading": {}}
SHIFT = {"status": "ok", "east_m": 1.0, "north_m": -0.5}


def _stats(median: float, nmad: float) -> dict:
    return {"count": 1000, "median": median, "nmad": nmad}


def _tile(tile_id: str, median: float = 0.1, **more) -> dict:
    ok = {"tile": tile_id, "status": "ok", "fingerprint": f"f{tile_id[0]}", "sources": []}
    return ok | {"stats": _stats(median, 0.3)} | more


BEFORE = {
    "job": {"spec": SPEC, "region_fingerprint": "r1", "finished": "2026-11-30T02:00:00+00:00"},
    "tiles": [
        _tile("a", coregistration=SHIFT | {"applied": False}),
        _tile("b"),
        _tile("gone", 0.0),
    ],
    "regions": [{"region": "R", "stats": _stats(0.1, 0.3)}],
    "sources": {},
    "grading_indicative": [{"standard": "S", "met": True}],
}  # fmt: skip


def test_a_changed_processing_section_or_region_file_recomputes_every_tile():
    assert spec_changes(BEFORE, SPEC, "r1") == []
    assert spec_changes(BEFORE, SPEC | {"grading": {"standards": ["nssda"]}}, "r1") == []
    changed = SPEC | {"options": {"resampling": "nearest"}}
    assert spec_changes(BEFORE, changed, "r2") == ["options", "region file content"]
    plan = change_plan(BEFORE, changed, {"a": "fa", "new": "fn"}, {}, {}, region_fingerprint="r1")
    assert plan.recompute == dict.fromkeys(["a", "new"], "job spec changed (options)")
    assert plan.added == ("new",) and plan.removed == ("b", "gone")


def test_unchanged_tiles_are_reused_and_their_shifts_known_without_applied():
    plan = change_plan(
        BEFORE, SPEC, {"a": "fa", "b": "fb2"}, {}, {"a": [], "b": []}, region_fingerprint="r1"
    )
    assert plan.reuse == ("a",) and set(plan.recompute) == {"b"} and plan.removed == ("gone",)
    known = known_shifts(tile_records(BEFORE), plan)
    assert {k: v.record() for k, v in known.items()} == {"a": SHIFT}


def test_the_change_report_judges_tiles_regions_and_lost_grades():
    plan = ChangePlan(recompute={"b": "test tile content changed"}, reuse=("a",), removed=("gone",))
    after = {
        "tiles": [
            {"tile": "a", "stats": _stats(0.1, 0.3)},
            {"tile": "b", "stats": _stats(0.1, 0.6)},
        ],
        "regions": [{"region": "R", "stats": _stats(0.1, 0.3)}],
        "grading_indicative": [{"standard": "S", "met": False}],
    }
    report = change_report(BEFORE, plan, after, Thresholds(), baseline="/runs/base")
    assert report["baseline"] == "/runs/base"
    assert report["baseline_finished"] == "2026-11-30T02:00:00+00:00"
    assert [(t["tile"], t["why"], t["verdict"]) for t in report["tiles"]] == [
        ("b", "test tile content changed", "regressed")  # NMAD doubled: > 10 % and > 0.05 m
    ]
    assert report["regions"][0]["region"] == "R"
    assert report["tiles_removed"] == ["gone"] and report["tiles_reused"] == 1
    assert len(report["grades_lost"]) == 1
    assert report["regressions"] == 2
