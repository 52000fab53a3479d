"""Which checkpoints a re-check samples again: those near the tiles that changed."""

from __future__ import annotations

import numpy as np

from demaudit.service.run.checkpoints import points_near

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


def test_cover_cautions_state_how_unclassified_points_were_graded():
    # our rule (issue: grade unclassified points as unclassified pixels are, and say so)
    from demaudit.service.run.checkpoints import _cover_cautions

    plain = {"cover_group": "non_vegetated", "unclassified": True, "landcover": None}
    unread = {"cover_group": "non_vegetated", "unclassified": True, "landcover": 3}
    unknown = {"cover_group": "unknown", "unclassified": False, "landcover": 9}
    out = _cover_cautions([plain, plain, unread, unknown], "non_vegetated")
    assert out[0].startswith("2 of 4 checkpoints have no land-cover class: graded as non-veg")
    assert out[1].startswith("1 of 4 checkpoints have a land-cover class but the job lists no")
    assert out[2].startswith("1 of 4 checkpoints have a land-cover class not listed")
    assert _cover_cautions([plain], "excluded") == [
        "1 of 1 checkpoints have no land-cover class: left out of grading "
        "(checkpoints.unclassified_group; unclassified pixels count as non-vegetated too)"
    ]
    classified = {"cover_group": "vegetated", "unclassified": False, "landcover": 2}
    assert _cover_cautions([classified], "non_vegetated") == []
