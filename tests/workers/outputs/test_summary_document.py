"""The summary document's resolution figures (the HTML page: test_report_html.py)."""

from __future__ import annotations

import numpy as np

from demaudit.workers.outputs.summary_document import area_entry, build_summary
from demaudit.workers.stats import summary as dhs


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
