"""The figure builders (figures/builders.py) draw what the document and summaries hold: the
drawn artists carry it (colour limits, one outline per region, the two Gaussian curves, the
worst tiles, intervals), and the metadata for summary.json says the same."""

from __future__ import annotations

import numpy as np
import pytest
from matplotlib.collections import PolyCollection
from matplotlib.image import AxesImage
from shapely.geometry import Polygon, box

from demaudit.workers.outputs.figures import builders, compute, draw
from demaudit.workers.stats import summary as dhs
from tests.support.figures import context, heavy_tailed, numpy_limits


def test_dh_map_colour_norm_outlines_and_missing_tiles(tmp_path):
    x = heavy_tailed()
    regions = [
        ("A", "Alpha", box(0.2, 0.1, 2.0, 0.9)),
        ("B", "Beta", Polygon([(2.5, 0.1), (4.5, 0.2), (3.5, 0.9)])),
        ("C", "outside", box(10, 10, 11, 11)),
    ]
    fig, meta = builders.build_dh_map(context(tmp_path, x, regions))
    ax = fig.axes[0]
    image = next(a for a in ax.get_children() if isinstance(a, AxesImage))
    low, high = numpy_limits(x)
    s = dhs.summarise(x)
    tol = dhs.statistic_bounds(s)["median"] + 3 * dhs.statistic_bounds(s)["nmad"]
    assert image.norm.vmin == pytest.approx(low, abs=tol)
    assert image.norm.vmax == pytest.approx(high, abs=tol)
    assert meta["colour_limits_m"] == [image.norm.vmin, image.norm.vmax]
    bar = fig.axes[-1]  # the colorbar's axes states the limits
    assert f"{image.norm.vmin:.3f}" in bar.get_ylabel()
    outlines = [p for p in ax.patches if (p.get_gid() or "").startswith("region:")]
    # one outline per region on the map (C lies outside it), with the region's own vertices
    assert sorted(p.get_gid() for p in outlines) == ["region:A", "region:B"]
    assert meta["regions_outlined"] == ["A", "B"]
    path_a = next(p for p in outlines if p.get_gid() == "region:A").get_path()
    assert np.allclose(path_a.vertices[:-1], np.asarray(regions[0][2].exterior.coords)[:-1])
    gids = {p.get_gid() for p in ax.patches}
    assert "failed:bad" in gids and "scale-bar" in gids
    assert any(a.get_gid() == "inset" for a in ax.child_axes)
    assert image.cmap.get_bad()[:3] == pytest.approx(
        tuple(int(draw.VOID_COLOUR[i : i + 2], 16) / 255 for i in (1, 3, 5))
    )
    legend = [t.get_text() for t in ax.get_legend().get_texts()]
    assert "void: no valid dh" in legend and "failed tile" in legend
    assert meta["void_fraction"] == pytest.approx(400 / 40_000)


def test_histogram_figure_draws_both_curves_from_the_summary(tmp_path):
    x = heavy_tailed()
    ctx = context(tmp_path, x, [])
    fig, meta = builders.build_histogram(ctx)
    ax = fig.axes[0]
    lines = {line.get_gid(): line for line in ax.get_lines()}
    h = compute.display_histogram(dhs.summarise(x))
    assert np.array_equal(lines["gauss:moments"].get_ydata(), h.gauss_moments)
    assert np.array_equal(lines["gauss:robust"].get_ydata(), h.gauss_robust)
    assert ax.get_yscale() == "log" and meta["log_counts"] is True
    assert meta["gaussian_robust"]["nmad_m"] == pytest.approx(
        dhs.statistics(dhs.summarise(x))["nmad"]
    )
    ctx.log_counts = False
    fig, _ = builders.build_histogram(ctx)
    assert fig.axes[0].get_yscale() == "linear"


def test_tile_map_colours_each_tile_and_labels_the_worst(tmp_path):
    ctx = context(tmp_path, heavy_tailed(), [])
    fig, meta = builders.tile_map_builder("median")(ctx)
    ax = fig.axes[0]
    collection = next(c for c in ax.collections if isinstance(c, PolyCollection))
    assert list(collection.get_array()) == [0.1, -2.0, 0.5, 0.0]
    assert (collection.norm.vmin, collection.norm.vmax) == (-2.0, 2.0)
    labels = [t for t in ax.texts if (t.get_gid() or "").startswith("worst:")]
    assert [t.get_gid() for t in labels] == [f"worst:{t}" for t in meta["worst_tiles"]]
    assert meta["worst_tiles"][0] == "t1"
    assert any(p.get_gid() == "no-value:bad" for p in ax.patches)


def test_recheck_figures(tmp_path):
    ctx = context(tmp_path, heavy_tailed(), [])
    ctx.document["recheck"] = {
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
    fig, meta = builders.build_recheck_map(ctx)
    gids = [p.get_gid() for p in fig.axes[0].patches]
    assert "tile:t1:regressed" in gids and len(gids) == 5
    assert meta["verdicts"] == {"regressed": 1, "reused": 4}
    fig, meta = builders.build_recheck_regions(ctx)
    after = [c for c in fig.axes[1].collections if c.get_gid() == "after:nmad"][0]
    assert after.get_offsets()[0][0] == 0.1


def test_geographic_dh_map_has_a_scale_bar_in_metres(tmp_path):
    x = heavy_tailed()
    lonlat_tiles = [
        {"tile": "a", "status": "ok", "bounds": [10.0, 59.0, 10.5, 60.0], "stats": {}},
        {"tile": "b", "status": "failed", "bounds": [10.5, 59.0, 11.0, 60.0], "stats": {}},
    ]
    ctx = context(tmp_path, x, [], lonlat_tiles, crs="EPSG:4326")
    ctx.__dict__["overview"] = (ctx.overview[0], (10.0, 59.0, 11.0, 60.0))
    fig, meta = builders.build_dh_map(ctx)
    ax = fig.axes[0]
    bar = next(p for p in ax.patches if p.get_gid() == "scale-bar")
    from demaudit.workers.outputs.figures.geometry import metres_per_degree_lon

    # two halves: the dark half is half the bar; degrees x metres per degree = the stated metres
    assert 2 * bar.get_width() * metres_per_degree_lon(59.5) == pytest.approx(meta["scale_bar_m"])
    assert "latitude 59.50" in meta["scale_bar_label"]
    assert ax.get_xlabel().startswith("longitude") and ax.get_aspect() == pytest.approx(
        1 / np.cos(np.radians(59.5))
    )


def test_strata_figure_draws_nmad_intervals(tmp_path):
    rng = np.random.default_rng(8)
    parts = {"slope_deg:0-5": rng.normal(0, 1, 800), "landcover:forest": rng.normal(0, 3, 300)}
    ctx = context(tmp_path, heavy_tailed(), [])
    ctx.document["overall_detail"] = {
        "strata": [
            {"stratum": k, "stats": dhs.statistics(dhs.summarise(v))} for k, v in parts.items()
        ]
    }
    fig, meta = builders.build_strata(ctx)
    entry = meta["panels"]["land cover"][0]
    assert entry["nmad_ci_95"] == list(compute.nmad_interval(entry["nmad"], 300))
    assert "Rousseeuw & Croux 1993" in meta["nmad_interval_rule"]
    # the drawn error bar spans the interval in summary.json
    drawn = next(c for a in fig.axes for c in a.collections if c.get_gid() == "nmad-ci:land cover")
    (low, _), (high, _) = drawn.get_segments()[0]
    assert [low, high] == pytest.approx(entry["nmad_ci_95"])


def test_tile_maps_follow_the_spec(tmp_path):
    ctx = context(tmp_path, heavy_tailed(), [])
    ctx.document["job"]["spec"] = {"figures": {"tile_statistics": ["q95_abs"]}}
    assert builders.tile_map_builder("median")(ctx) is None
    fig, meta = builders.tile_map_builder("q95_abs")(ctx)
    collection = next(c for c in fig.axes[0].collections if isinstance(c, PolyCollection))
    assert list(collection.get_array()) == [0.4, 0.6, 3.0, 0.2]  # 2 x NMAD in tiles()
    assert meta["worst_tiles"][0] == "t2"
