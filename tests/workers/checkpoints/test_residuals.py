"""Checkpoint rows without a cluster: which tile samples each point, which points a re-check
samples again (those near the tiles that changed), the samples and dh."""

from __future__ import annotations

import numpy as np
import pytest
from pyproj import CRS

from demaudit.workers.checkpoints.points import Checkpoint, CheckpointFile, Rejected
from demaudit.workers.checkpoints.residuals import (
    RESIDUAL_COLUMNS,
    CheckpointRow,
    Datums,
    in_test_datum,
    place_points,
    points_near,
    rejected_rows,
    with_samples,
)

CHANGED = [(1000.0, 2000.0, 1500.0, 2500.0)]  # one recomputed tile, left bottom right top


def test_points_inside_or_within_the_margin_of_a_changed_tile_are_sampled_again():
    xs = np.array([1200.0, 999.0, 990.0, 1500.0, 1511.0, 1200.0, 1200.0])
    ys = np.array([2200.0, 2200.0, 2200.0, 2500.0, 2200.0, 1995.0, 2600.0])
    got = points_near(xs, ys, CHANGED, margin=10.0)
    # inside; 1 m left of the edge; 10 m left (on the margin); corner; 11 m right; 5 m below; far
    assert got.tolist() == [True, True, True, True, False, True, False]


def test_no_changed_area_samples_nothing_again_and_areas_add_up():
    xs, ys = np.array([0.0, 5000.0]), np.array([0.0, 5000.0])
    assert not points_near(xs, ys, [], margin=10.0).any()
    both = [(-1.0, -1.0, 1.0, 1.0), (4999.0, 4999.0, 5001.0, 5001.0)]
    assert points_near(xs, ys, both, margin=0.0).tolist() == [True, True]


TILES = [(0.0, 0.0, 100.0, 100.0), (100.0, 0.0, 200.0, 100.0)]  # left bottom right top


def _points(*xy: tuple[float, float]) -> list[Checkpoint]:
    return [Checkpoint(f"p{i}", x, y, 10.0 + i, None) for i, (x, y) in enumerate(xy)]


def test_points_go_to_the_first_tile_holding_them_or_are_rejected():
    pts = _points((50, 50), (100, 50), (150, 50), (250, 50))  # the 2nd is on the shared edge
    xs, ys = np.array([p.x for p in pts]), np.array([p.y for p in pts])
    again = np.ones(4, dtype=bool)
    rows, by_tile = place_points(pts, xs, ys, TILES, earlier={}, again=again)
    assert by_tile == {0: [("p0", 50.0, 50.0), ("p1", 100.0, 50.0)], 1: [("p2", 150.0, 50.0)]}
    assert rows["p3"].status == "rejected" and rows["p3"].reason == "outside every test tile"
    assert [r.status for r in rows.values()][:3] == ["", "", ""]  # awaiting their samples


def test_a_point_keeps_its_earlier_height_unless_marked_again():
    pts = _points((50, 50), (150, 50))
    xs, ys = np.array([50.0, 150.0]), np.array([50.0, 50.0])
    earlier = {"p0": 11.5, "p1": 12.5}
    rows, by_tile = place_points(pts, xs, ys, TILES, earlier=earlier, again=np.array([False, True]))
    assert rows["p0"].used and rows["p0"].test_height_m == 11.5
    assert by_tile == {1: [("p1", 150.0, 50.0)]}


def test_samples_are_added_without_changing_the_rows_given():
    rows = {"p0": CheckpointRow("p0"), "p1": CheckpointRow("p1")}
    got = with_samples(rows, [("p0", 12.25, None), ("p1", None, "nodata under the point")])
    assert got["p0"].used and got["p0"].test_height_m == 12.25
    assert got["p1"].status == "rejected" and got["p1"].reason == "nodata under the point"
    assert rows["p0"].status == "" and rows["p0"].test_height_m is None


def test_rejected_rows_keep_duplicated_ids_apart():
    data = CheckpointFile((), (Rejected("a", "duplicate id"), Rejected("a", "no height")), {})
    rows = rejected_rows(data)
    assert list(rows) == ["#rejected-0", "#rejected-1"]
    assert [r.reason for r in rows.values()] == ["duplicate id", "no height"]


def test_dh_is_test_minus_checkpoint_in_metres():
    # feet to metres: 0.3048 m per international foot (exact, by definition)
    pts = [Checkpoint("p0", 500_000.0, 6_200_000.0, 100.0, None)]
    rows = {"p0": CheckpointRow("p0", "used", test_height_m=31.0)}
    datums = Datums("foot", "ellipsoidal", "ellipsoidal", ())
    got = in_test_datum(rows, pts, CRS.from_epsg(32632), datums)["p0"]
    assert got.checkpoint_height_m == pytest.approx(30.48)
    assert got.dh_m == pytest.approx(31.0 - 30.48)
    assert got.csv_row()[RESIDUAL_COLUMNS.index("dh_m")] == got.dh_m
