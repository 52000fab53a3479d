"""Standard errors of areas and strata (workers/uncertainty/areas.py)."""

from __future__ import annotations

import numpy as np

from demaudit.workers.tile.strata import ClassInfo
from demaudit.workers.uncertainty import areas
from demaudit.workers.uncertainty.sample import DEGREE_BINS

PIXEL = 5.0


def test_stratum_counts_follow_the_slope_bands():
    counts = np.zeros((2, DEGREE_BINS), np.int64)
    counts[0, 3] = 10  # open ground, 3-4 degrees
    counts[0, 20] = 5  # open ground, 20-21 degrees
    counts[1, 20] = 7  # no class
    classes = (ClassInfo(1, "open", "non_vegetated"),)
    out = areas.stratum_counts(counts, with_landcover=True, classes=classes, slope_edges=[0, 5, 15])
    assert out["landcover:open"].sum() == 15
    assert out["slope_deg:15+"].sum() == 12
    assert out["cover_group:non_vegetated/slope_deg:0-5"].sum() == 10
