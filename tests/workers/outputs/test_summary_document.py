"""The summary document's resolution figures (the HTML page: test_report_html.py)."""

from __future__ import annotations

import numpy as np
import pytest

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


def test_each_stratum_carries_the_95_interval_of_its_nmad():
    # NMAD +- 1.96 x 1.1664 NMAD / sqrt(n): the asymptotic standard error of the NMAD at the
    # Gaussian (MAD efficiency 36.75 %, Rousseeuw & Croux 1993, JASA 88:1273, section 1);
    # the NMAD itself against numpy (1.4826 x median |x - median|)
    rng = np.random.default_rng(5)
    x = rng.normal(0.2, 0.4, 2500)
    strata = {"slope_deg:0-5": dhs.summarise(x), "landcover:1": dhs.summarise(np.array([0.3]))}
    entry = area_entry(dhs.summarise(x), strata, outlier_rule="nmad", outlier_factor=5.0)
    by_key = {s["stratum"]: s for s in entry["strata"]}
    nmad = by_key["slope_deg:0-5"]["stats"]["nmad"]
    assert nmad == pytest.approx(1.4826 * np.median(np.abs(x - np.median(x))), abs=2e-3)
    half = 1.959964 * 1.1664 * nmad / np.sqrt(2500)
    assert by_key["slope_deg:0-5"]["nmad_ci_95"] == pytest.approx([nmad - half, nmad + half])
    assert by_key["landcover:1"]["nmad_ci_95"] is None  # one value: no interval
