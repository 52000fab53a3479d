"""summary.json assembled once from typed parts: section order and the order of the cautions."""

from __future__ import annotations

from dataclasses import replace

from demaudit.workers.outputs.job_document import Figures, JobInfo, JobParts, assemble
from demaudit.workers.outputs.summary_document import CAUTIONS_ALWAYS
from demaudit.workers.outputs.tile_records import TileRecord
from demaudit.workers.stats.job_statistics import AreaStatistics

INFO = JobInfo("j", {"name": "j"}, "t0", "t1", "demaudit", None, test_tiles=2, reference_tiles=1)
PARTS = JobParts(
    job=INFO,
    areas=AreaStatistics({"stats": {"median": 0.1}, "resolution_m": {}}, []),
    excluded_pixels=7,
    tiles=[TileRecord("a", "ok", {}), TileRecord("b", "failed", {}, "unreadable")],
    reference_failures=[],
    sources={"reference:r": "f"},
    early_cautions=["early"],
    cautions=["late"],
)


def test_a_plain_job_has_the_base_sections_and_counts_its_failed_tiles():
    doc = assemble(PARTS)
    assert list(doc)[-2:] == ["cautions", "sources"]
    assert doc["job"]["tiles"] == {"test": 2, "reference": 1, "failed": 1}
    assert "timings_s" not in doc["job"]
    assert doc["overall_detail"]["excluded_pixels"] == 7
    assert doc["cautions"][: len(CAUTIONS_ALWAYS)] == list(CAUTIONS_ALWAYS)
    assert doc["cautions"][len(CAUTIONS_ALWAYS)] == "early"
    assert doc["cautions"][-1] == "late"
    assert doc["cautions"][-2].startswith("1 test tile(s) failed")


def test_every_part_lands_in_its_section_in_order():
    parts = replace(
        PARTS,
        job=replace(INFO, timings_s={"tiles": 1.5}),
        areas=replace(PARTS.areas, error_model={"model": 1}),
        checkpoints={"cautions": ["checkpoint"], "grading": []},
        grading_indicative=[],
        recheck={"regressions": 0},
        figures=Figures({}, "figures or report.html could not be drawn: disk"),
    )
    doc = assemble(parts)
    tail = ["cautions", "error_model", "sources", "checkpoints", "grading_indicative"]
    assert list(doc)[-7:] == tail + ["recheck", "figures"]
    assert doc["job"]["timings_s"] == {"tiles": 1.5}
    assert doc["cautions"][-3:] == [
        "late",
        "checkpoint",
        "figures or report.html could not be drawn: disk",
    ]
    assert assemble(parts) == doc  # a pure function of the parts
