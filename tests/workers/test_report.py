"""The summary document's resolution figures and the HTML page's grade cells."""

from __future__ import annotations

import numpy as np

from workers import grading
from workers import summary as dhs
from workers.report import area_entry, build_summary
from workers.report_html import render


def test_each_area_reports_the_bounds_of_its_own_statistics():
    # bimodal +-3,000 m: the median's bound comes from the 0.3 m bins either side (0.01 % of
    # 3,000 m), not the 0.2 mm width at a median near 0; numpy.median as the reference
    x = np.concatenate([np.random.default_rng(2).normal(m, 0.05, 500) for m in (-3000, 3000)])
    entry = area_entry(dhs.summarise(x), {}, outlier_rule="nmad", outlier_factor=5.0)
    bound = entry["resolution_m"]["median"]
    assert abs(entry["stats"]["median"] - np.median(x)) <= bound
    assert bound > 0.1
    doc = build_summary(
        job={"name": "t"}, overall=entry, regions=[], tiles=[], reference_failures=[]
    )
    assert doc["quantile_resolution_m"]["overall"] == entry["resolution_m"]
    assert "independent pixels" in doc["overall_detail"]["confidence_95"]["assumes"]


def test_report_page_shows_the_nssda_sentence_and_the_scope():
    # NSSDA (FGDC-STD-007.3-1998): without a required accuracy the standard states a figure,
    # "Tested ... m vertical accuracy at 95 % confidence level"; the page shows that sentence
    m = grading.Measured(0.05, None, 30, 0, survey_rmse_m=0.01)
    grades = [grading.grade_nssda(m), grading.grade_asprs2014(m, class_cm=10)]
    stats = {"count": 30, "rmse": 0.05}
    cp = {
        "counts": {"used": 30, "read": 30, "rejected": 0},
        "stats": stats,
        "grading": grades,
        "cautions": ["30 of 30 checkpoints have no land-cover class: graded as non-vegetated"],
        "residuals_file": "checkpoint_residuals.csv",
    }
    doc = {
        "job": {"name": "t"},
        "sign": "test minus reference",
        "units": "metre",
        "overall": stats,
        "regions": [],
        "overall_detail": {},
        "checkpoints": cp,
    }
    page = render(doc)
    assert "Tested 0.098 m vertical accuracy at 95 % confidence level" in page
    assert "not decided" not in page
    assert "graded as non-vegetated" in page
    assert "VVA was not tested" in page
    assert "vva_95 – ≤ 0.300: not tested: no vegetated checkpoints" in page
