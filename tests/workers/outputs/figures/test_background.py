"""Figures drawn in the background (figures/background.py) are the figures write_figures draws:
same files, same metadata, the re-check figures from the final document."""

from __future__ import annotations

import threading

import pytest

from demaudit.workers.outputs import figures
from demaudit.workers.outputs.figures import background
from demaudit.workers.stats import summary as dhs
from tests.support.figures import heavy_tailed, tiles

RECHECK = {
    "tiles": [{"tile": "t1", "verdict": "regressed"}],
    "regions": [
        {
            "region": "A",
            "verdict": "improved",
            "before": {"count": 5, "nmad": 0.3, "median": 0.2},
            "after": {"count": 5, "nmad": 0.1, "median": 0.0},
        }
    ],
}


def _document(s: dhs.DhSummary) -> dict:
    strata = [{"stratum": "slope_deg:0-5", "stats": dhs.statistics(s)}]
    return {
        "job": {"name": "t"},
        "overall": dhs.statistics(s),
        "overall_detail": {"strata": strata},
        "tiles": tiles(),
    }


def test_background_figures_equal_those_drawn_at_the_end(tmp_path):
    s = dhs.summarise(heavy_tailed())
    strata = {"slope_deg:0-5": s}
    early, final = _document(s), _document(s) | {"recheck": RECHECK}
    (tmp_path / "bg").mkdir()
    (tmp_path / "end").mkdir()
    drawing = background.start_figures(tmp_path / "bg", early, overall=s, strata=strata)
    got = drawing.finish(final)
    want = figures.write_figures(tmp_path / "end", final, overall=s, strata=strata)
    assert list(got) == list(want)  # same figures, in the BUILDERS order
    assert {"recheck_tiles.png", "recheck_regions.png", "dh_by_stratum.png"} <= set(got)
    assert got == want
    for name in got:
        assert (tmp_path / "bg" / name).stat().st_size > 0
    assert drawing.seconds is not None and drawing.seconds[0] > 0


def test_background_figures_run_on_one_thread_and_report_errors_at_finish(tmp_path):
    s = dhs.summarise(heavy_tailed(2000))
    names = []

    def build(ctx):
        names.append(threading.current_thread().name)
        raise ValueError("no such figure")

    (tmp_path / "out").mkdir()
    original = figures.BUILDERS[:]
    try:
        figures.BUILDERS[:] = [("bad.png", build)]
        drawing = background.start_figures(tmp_path / "out", _document(s), overall=s, strata={})
        with pytest.raises(ValueError, match="no such figure"):
            drawing.finish(_document(s))
    finally:
        figures.BUILDERS[:] = original
    assert names and names[0].startswith("demaudit-figures")
