"""report.html (report_html.py, report_sections.py, report_format.py): grade cells and the
standards' sentences, every section, figures embedded in their sections, no network, a print
stylesheet."""

from __future__ import annotations

import base64
import re

from demaudit.workers.checkpoints import grading
from demaudit.workers.outputs.report_format import change_table, interval, number
from demaudit.workers.outputs.report_html import FIGURE_SECTIONS, render


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


def _document() -> dict:
    stats = {"count": 10, "median": 0.1, "nmad": 0.2, "rmse": 0.3}
    return {
        "job": {"name": "t", "software": "demaudit x", "tiles": {"test": 2, "reference": 3}},
        "sign": "test minus reference",
        "units": "metre",
        "overall": stats,
        "overall_detail": {
            "confidence_95": {"median": [0.05, 0.15], "assumes": "independent pixels"},
            "strata": [{"stratum": "slope_deg:0-5", "stats": stats}],
        },
        "regions": [{"region": "A", "name": "Alpha", "stats": stats}],
        "tiles": [{"tile": "t1", "status": "failed", "reason": "unreadable header"}],
        "cautions": ["These statistics support, but do not replace, acceptance of the release"],
        "sources": {
            "test:t1": "ab" * 32,
            "vertical_transformations": [
                {"role": "reference", "from": "EPSG:5773", "to": "ellipsoidal", "accuracy_m": 1.0}
            ],
        },
        "recheck": {
            "baseline": "/runs/old",
            "baseline_finished": "2026-12-01T02:00:00+00:00",
            "thresholds": {
                "nmad_worse_fraction": 0.1,
                "nmad_worse_m": 0.05,
                "median_moved_m": 0.05,
            },
            "tiles_added": [],
            "tiles_removed": ["t9"],
            "tiles_recomputed": ["t1"],
            "tiles_reused": 1,
            "tiles": [
                {
                    "tile": "t1",
                    "why": "changed",
                    "verdict": "regressed",
                    "flags": ["nmad worse by 0.100 m (+50%)"],
                    "before": {"median": 0.0, "nmad": 0.2},
                    "after": {"median": 0.0, "nmad": 0.3},
                }
            ],
            "regions": [
                {"region": "A", "verdict": "unchanged", "flags": [], "before": {}, "after": {}}
            ],
            "grades_lost": [{"standard": "ASPRS 2014", "flag": "grade lost"}],
            "regressions": 2,
        },
        "figures": {
            "dh_map.png": {
                "shows": "dh map",
                "colour_limits_m": [-0.5, 0.7],
                "limit_rule": "median +- 3 x NMAD",
            },
            "variogram.png": {"shows": "a variogram"},
            "missing.png": {"shows": "not written"},
        },
    }


def test_report_page_embeds_figures_and_has_every_section():
    png = b"\x89PNG\r\n\x1a\nfake"
    page = render(_document(), images={"dh_map.png": png, "variogram.png": png})
    encoded = base64.b64encode(png).decode()
    assert page.count(f'src="data:image/png;base64,{encoded}"') == 2
    assert "missing.png" not in page  # a figure whose file is not there is left out
    assert "Colour limits -0.500 to 0.700 m (median +- 3 x NMAD)" in page
    # no network: nothing is linked or fetched from elsewhere
    assert not re.search(r'(src|href)="(?!data:|#)', page)
    assert "@media print" in page
    for anchor in ("overall", "regions", "tiles", "strata", "recheck", "other-figures", "sources"):
        assert f'<section id="{anchor}">' in page and f'href="#{anchor}"' in page
    other = page[page.index('<section id="other-figures">') :]
    assert 'alt="variogram.png"' in other.split("</section>")[0]
    assert "do not replace, acceptance" in page
    assert "[0.050, 0.150]" in page  # the median's interval
    assert "2 regressions" in page and "nmad worse by 0.100 m (+50%)" in page
    assert "ASPRS 2014: grade lost" in page and "1 removed" in page
    assert "EPSG:5773 → ellipsoidal" in page and "ab" * 32 in page
    assert "unreadable header" in page


def test_report_page_without_optional_sections():
    document = _document()
    for key in ("recheck", "figures", "sources"):
        document.pop(key)
    page = render(document)
    assert 'id="recheck"' not in page and "<img" not in page and 'id="other-figures"' not in page


def test_every_tile_map_has_a_place_on_the_page():
    from demaudit.workers.outputs.figures import TILE_STATISTICS, tile_map_name

    assert {FIGURE_SECTIONS[tile_map_name(s)] for s in TILE_STATISTICS} == {"tiles"}


def test_formatting_of_numbers_intervals_and_changes():
    assert number(1234) == "1,234" and number(0.12345) == "0.123" and number(None) == "–"
    assert interval([0.1, None]) == "[0.100, –]" and interval(None) == "–"
    rows = [{"region": "A<", "verdict": "regressed", "before": {"nmad": 0.1}, "after": {}}]
    table = change_table("region", rows, "region")
    assert "A&lt;" in table and "<td class='regressed'>regressed</td>" in table
    assert change_table("tile", [], "tile") == ""


def test_strata_section_gives_each_nmad_its_interval():
    from demaudit.workers.outputs.figures.compute import nmad_interval
    from demaudit.workers.outputs.report_sections import strata

    stats = {"count": 400, "nmad": 0.5, "median": 0.0}
    entries = [{"stratum": "slope_deg:0-5", "stats": stats}, {"stratum": "x", "stats": {}}]
    low, high = nmad_interval(0.5, 400)
    html = "".join(strata({"overall_detail": {"strata": entries}}))
    assert f"<td>slope_deg:0-5</td><td>0.500</td><td>[{low:.3f}, {high:.3f}]</td>" in html
    assert "Rousseeuw &amp; Croux 1993" in html and "<td>x</td><td>0.000" not in html
