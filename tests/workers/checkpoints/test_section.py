"""The checkpoints section of summary.json from typed rows, without a cluster."""

from __future__ import annotations

import numpy as np
import pytest
from pyproj import CRS
from shapely.geometry import box

from demaudit.workers.checkpoints.grading import Measured
from demaudit.workers.checkpoints.residuals import CheckpointRow
from demaudit.workers.checkpoints.section import (
    SectionInputs,
    checkpoint_section,
    cover_cautions,
    grade,
    with_cover_groups,
)
from demaudit.workers.inputs.catalog import TileInfo
from demaudit.workers.inputs.regions import Region
from demaudit.workers.spec import Grading
from demaudit.workers.tile.grid import Grid
from demaudit.workers.tile.strata import ClassInfo

CRS_WKT = CRS.from_epsg(32632).to_wkt()
TILE = TileInfo(
    "t",
    "t.tif",
    Grid(CRS_WKT, (10.0, 0.0, 0.0, 0.0, -10.0, 1000.0), 100, 100),
    None,
    "float32",
    0,
    "",
)
CLASSES = [ClassInfo(1, "open ground", "non_vegetated"), ClassInfo(2, "forest", "vegetated")]


def test_cover_cautions_state_how_unclassified_points_were_graded():
    # our rule (issue: grade unclassified points as unclassified pixels are, and say so)
    plain = CheckpointRow("a", "used", cover_group="non_vegetated", unclassified=True)
    unread = CheckpointRow("b", "used", landcover=3, cover_group="non_vegetated", unclassified=True)
    unknown = CheckpointRow("c", "used", landcover=9, cover_group="unknown", unclassified=False)
    out = cover_cautions([plain, plain, unread, unknown], "non_vegetated")
    assert out[0].startswith("2 of 4 checkpoints have no land-cover class: graded as non-veg")
    assert out[1].startswith("1 of 4 checkpoints have a land-cover class but the job lists no")
    assert out[2].startswith("1 of 4 checkpoints have a land-cover class not listed")
    assert cover_cautions([plain], "excluded") == [
        "1 of 1 checkpoints have no land-cover class: left out of grading "
        "(checkpoints.unclassified_group; unclassified pixels count as non-vegetated too)"
    ]
    classified = CheckpointRow("d", "used", landcover=2, cover_group="vegetated")
    assert cover_cautions([classified], "non_vegetated") == []


def _rows() -> dict[str, CheckpointRow]:
    dh = {"p0": 0.1, "p1": -0.2, "p2": 0.3, "p3": 0.5}
    cover = {"p0": 1, "p1": 1, "p2": 2, "p3": None}
    rows = {
        k: CheckpointRow(
            k, "used", x_test_crs=100.0 + 200 * i, y_test_crs=500.0, landcover=cover[k], dh_m=v
        )
        for i, (k, v) in enumerate(dh.items())
    }
    return rows | {"#rejected-0": CheckpointRow("p9", "rejected", "no height")}


def _given(**changes) -> SectionInputs:
    fields = dict(
        grading=Grading(standards=["nssda"]),
        unclassified_group="non_vegetated",
        survey_rmse_m=0.02,
        tests=[TILE],
        regions={CRS_WKT: [Region("W", "west", box(0, 0, 400, 1000), CRS_WKT)]},
        shown_file="points.csv",
        fingerprint="abc",
        residuals_file="checkpoint_residuals.csv",
    )
    return SectionInputs(**(fields | changes))


def test_the_section_counts_groups_and_grades_the_used_rows():
    rows = with_cover_groups(_rows(), CLASSES, "non_vegetated")
    assert rows["p3"].cover_group == "non_vegetated" and rows["p3"].unclassified
    assert rows["#rejected-0"].cover_group is None  # only used rows are grouped
    section = checkpoint_section(rows, _given())
    assert section["counts"] == {"read": 5, "used": 4, "rejected": 1}
    assert section["rejected"] == [{"id": "p9", "reason": "no height"}]
    # RMSE of all residuals by hand: sqrt((0.01 + 0.04 + 0.09 + 0.25) / 4)
    assert section["stats"]["rmse"] == pytest.approx(np.sqrt(0.39 / 4))
    assert section["by_class"].keys() == {"1", "2", "None"}
    assert section["by_cover_group"]["non_vegetated"]["count"] == 3
    assert section["by_region"]["W"]["count"] == 2  # p0 (x 100) and p1 (x 300)
    # NSSDA (FGDC-STD-007.3-1998): 1.96 x the non-vegetated RMSE_z
    nv_rmse = np.sqrt((0.01 + 0.04 + 0.25) / 3)
    assert section["grading"][0]["accuracy_z_95_m"] == pytest.approx(1.96 * nv_rmse)
    assert section["grading"][0]["assumptions"] == section["cautions"] != []
    assert section["residuals_file"] == "checkpoint_residuals.csv"


def test_indicative_grades_say_so():
    measured = Measured(0.1, 0.3, 100, 50, indicative=True)
    out = grade(measured, Grading(standards=["nssda", "asprs2014"], asprs_class_cm=10))
    assert len(out) == 2 and all(g["indicative"] for g in out)
    assert all("assumptions" not in g for g in out)
