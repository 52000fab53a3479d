"""write_figures (figures/__init__.py): writes the PNGs the results allow, returns what each
shows (JSON for summary.json), takes extra builders."""

from __future__ import annotations

import json

from demaudit.workers.outputs import figures
from demaudit.workers.outputs.figures import draw
from demaudit.workers.stats import summary as dhs
from demaudit.workers.stats.robust import confidence_intervals
from tests.support.figures import heavy_tailed, tiles


def test_write_figures_without_results_zarr_draws_what_the_document_allows(tmp_path):
    x = heavy_tailed()
    s = dhs.summarise(x)
    strata = {"slope_deg:0-5": s, "landcover:forest": s}
    document = {
        "job": {"name": "t"},
        "overall": dhs.statistics(s),
        "overall_detail": {
            "strata": [{"stratum": k, "stats": dhs.statistics(v)} for k, v in strata.items()]
        },
        "tiles": tiles(),
    }
    meta = figures.write_figures(tmp_path, document, overall=s, strata=strata)
    assert "dh_map.png" not in meta  # no overview in this folder
    assert {"dh_histogram.png", "tile_grade.png", "dh_by_stratum.png"} <= set(meta)
    for name in meta:
        assert (tmp_path / name).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    json.dumps(meta)  # goes into summary.json as it is
    ci = meta["dh_by_stratum.png"]["panels"]["land cover"][0]["median_ci_95"]
    assert ci == confidence_intervals(s)["median"]


def test_extra_figures_can_be_registered(tmp_path, monkeypatch):
    def build(ctx):
        fig = draw.new_figure(2, 2)
        fig.add_subplot().plot([0, 1])
        return fig, {"shows": "a line"}

    monkeypatch.setattr(figures, "BUILDERS", [*figures.BUILDERS, ("extra.png", build)])
    meta = figures.write_figures(tmp_path, {"job": {"name": "t"}, "overall": {}})
    assert meta == {"extra.png": {"shows": "a line"}}
