"""Change planning and verdicts of the nightly re-check (pure)."""

from __future__ import annotations

from demaudit.workers.recheck.plan import Thresholds, compare, lost_grades, plan

BASE_TILES = {
    "a": {"fingerprint": "fa", "status": "ok", "sources": ["reference:r1"]},
    "b": {"fingerprint": "fb", "status": "ok", "sources": ["reference:r1", "reference:r2"]},
    "c": {"fingerprint": "fc", "status": "ok", "sources": ["reference:r3"]},
    "d": {"fingerprint": "fd", "status": "failed", "sources": []},
    "gone": {"fingerprint": "fg", "status": "ok", "sources": []},
}
BASE_SOURCES = {"reference:r1": "1", "reference:r2": "2", "reference:r3": "3"}


def test_nothing_changed_reuses_everything_that_was_ok():
    change = plan(
        baseline_tiles=BASE_TILES,
        baseline_sources=BASE_SOURCES,
        current_tiles={"a": "fa", "b": "fb", "c": "fc", "d": "fd"},
        current_sources=BASE_SOURCES,
        overlaps={
            "a": ["reference:r1"],
            "b": ["reference:r1", "reference:r2"],
            "c": ["reference:r3"],
        },
    )
    assert change.reuse == ("a", "b", "c")
    assert change.recompute == {"d": "baseline status was failed"}
    assert change.removed == ("gone",)


def test_changed_test_tile_and_changed_reference():
    change = plan(
        baseline_tiles=BASE_TILES,
        baseline_sources=BASE_SOURCES,
        current_tiles={"a": "fa2", "b": "fb", "c": "fc", "new": "fn"},
        current_sources=BASE_SOURCES | {"reference:r2": "2-new"},
        overlaps={"b": ["reference:r1", "reference:r2"], "c": ["reference:r3"]},
    )
    assert change.recompute["a"] == "test tile content changed"
    assert "reference:r2" in change.recompute["b"]
    assert change.recompute["new"] == "new test tile"
    assert change.reuse == ("c",)
    assert change.added == ("new",)


def test_removed_reference_tile_recomputes_its_former_users():
    sources = {k: v for k, v in BASE_SOURCES.items() if k != "reference:r3"}
    change = plan(
        baseline_tiles=BASE_TILES,
        baseline_sources=BASE_SOURCES,
        current_tiles={"c": "fc"},
        current_sources=sources,
        overlaps={"c": []},
    )
    assert "reference:r3" in change.recompute["c"]


LIMITS = Thresholds()


def stats(median, nmad, count=100):
    return {"count": count, "median": median, "nmad": nmad, "rmse": 1.0, "q95_abs": 1.0}


def test_verdicts():
    assert compare(stats(0.2, 0.30), stats(0.2, 0.25), LIMITS)["verdict"] == "improved"
    assert compare(stats(0.2, 0.30), stats(0.2, 0.31), LIMITS)["verdict"] == "unchanged"
    worse = compare(stats(0.2, 0.30), stats(0.2, 0.34), LIMITS)  # +13 %
    assert worse["verdict"] == "regressed" and "nmad worse" in worse["flags"][0]
    moved = compare(stats(0.2, 0.30), stats(0.3, 0.30), LIMITS)
    assert moved["verdict"] == "regressed" and "median moved" in moved["flags"][0]
    assert compare(None, stats(0, 1), LIMITS)["verdict"] == "new"
    assert compare(stats(0, 1), {"count": 0}, LIMITS)["verdict"] == "removed"


def test_lost_grades():
    before = [{"standard": "X", "met": True}, {"standard": "Y", "met": False}]
    after = [{"standard": "X", "met": False}, {"standard": "Y", "met": True}]
    assert lost_grades(before, after) == [{"standard": "X", "flag": "grade lost"}]


def test_tiles_without_reference_are_carried_over():
    tiles = {"edge": {"fingerprint": "fe", "status": "no_reference", "sources": []}}
    change = plan(
        baseline_tiles=tiles,
        baseline_sources={},
        current_tiles={"edge": "fe"},
        current_sources={},
        overlaps={"edge": []},
    )
    assert change.reuse == ("edge",) and not change.recompute
