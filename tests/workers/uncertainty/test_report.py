"""The uncertainty section of report.html (workers/uncertainty/report.py)."""

from __future__ import annotations

from demaudit.workers.outputs.report_html import render
from demaudit.workers.uncertainty.report import uncertainty_section

SECTION = {
    "sigma_model": {"a_m": 0.3, "b_m": 0.5, "c": 1.0, "d_m": 0.01},
    "sigma_by_slope": {
        "bins": [
            {"low": 0.0, "high": 2.0, "count": 5000, "nmad": 0.301, "model_m": 0.309},
            {"low": 2.0, "high": 4.0, "count": 40, "nmad": 0.9, "model_m": 0.33},
        ]
    },
    "stable_pixels": 600000,
    "tiles": 36,
    "samples": 54000,
    "nugget": 0.73,
    "components": [{"model": "spherical", "range_m": 190.4, "sill": 0.3}],
    "fit": {"r_squared": 0.97},
}
REGION = {
    "region": "HF",
    "name": "Harrow Fen",
    "stats": {"count": 185759, "mean": 0.25, "median": 0.244},
    "uncertainty": {
        "mean_se_m": 0.09,
        "median_se_m": 0.113,
        "median_95_m": [0.02, 0.47],
        "independent_pixels_mean_se_m": 0.0007,
    },
}


def test_the_section_lists_components_sigma_by_slope_and_the_regions_standard_errors():
    assert uncertainty_section({"regions": [REGION]}) == []  # no error model, no section
    html = "".join(uncertainty_section({"error_model": SECTION, "regions": [REGION]}))
    assert "<td>spherical</td><td>190</td><td>0.300</td>" in html
    assert "<td>nugget</td><td>–</td><td>0.730</td>" in html
    assert "<td>0–2</td><td>5,000</td><td>0.301</td><td>0.309</td>" in html
    assert "2–4" not in html  # 40 stable pixels: too few to show
    assert "<td>HF Harrow Fen</td><td>0.250</td><td>0.090</td><td>0.244</td><td>0.113</td>" in html
    assert "[0.020, 0.470]" in html and "0.0007" in html


def test_report_html_shows_the_section_with_its_figure_slot():
    document = {
        "job": {"name": "j"},
        "sign": "test - reference",
        "units": "metre",
        "overall": {"count": 10},
        "regions": [REGION],
        "error_model": SECTION,
        "cautions": [],
    }
    page = render(document)
    assert '<section id="uncertainty"><h2>Uncertainty (error model)</h2>' in page
    assert "median_se_m" in page and '<a href="#uncertainty">' in page
