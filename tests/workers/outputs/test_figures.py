"""Figures: what they draw is computed from the job's own numbers (checked against numpy), and
the drawn artists carry it (colour limits, outlines per region, the two Gaussian curves)."""

from __future__ import annotations

import json

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from matplotlib.collections import PatchCollection
from matplotlib.image import AxesImage
from shapely.geometry import Polygon, box

from demaudit.workers.outputs import figures
from demaudit.workers.outputs.figures import compute, draw
from demaudit.workers.stats import summary as dhs
from demaudit.workers.stats.robust import confidence_intervals

NMAD = 1.4826  # 1 / Phi^-1(0.75): Höhle & Höhle (2009)


def heavy_tailed(n: int = 60_000, seed: int = 1) -> np.ndarray:
    # 85 % N(0.2, 0.3) and 15 % blunders N(8, 6): a heavy right tail (invented, common practice)
    rng = np.random.default_rng(seed)
    core = rng.normal(0.2, 0.3, int(n * 0.85))
    tail = rng.normal(8.0, 6.0, n - core.size)
    return np.concatenate([core, tail])


def numpy_limits(x: np.ndarray, k: float = 3.0) -> tuple[float, float]:
    """median +- k x NMAD with numpy alone (NMAD = 1.4826 x median |x - median|)."""
    median = float(np.median(x))
    nmad = NMAD * float(np.median(np.abs(x - median)))
    return median - k * nmad, median + k * nmad


def test_colour_limits_equal_numpy_robust_limits_on_heavy_tailed_data():
    x = heavy_tailed()
    s = dhs.summarise(x)
    limits = compute.limits_of_summary(s)
    assert limits is not None
    low, high = numpy_limits(x)
    bounds = dhs.statistic_bounds(s)
    # the histogram's quantiles are within their stated bounds of numpy's (workers/stats/summary.py)
    tol = bounds["median"] + 3 * bounds["nmad"]
    assert abs(limits.low - low) <= tol and abs(limits.high - high) <= tol
    # a heavy tail does not stretch them: far inside min/max and mean +- 3 std
    assert limits.high < x.mean() + 3 * x.std() and limits.high - limits.low < 5.0


def test_colour_limits_keep_a_minimum_width():
    limits = compute.robust_limits(1.0, 0.0)
    assert (limits.low, limits.high) == (
        1.0 - compute.MIN_HALF_WIDTH_M,
        1.0 + compute.MIN_HALF_WIDTH_M,
    )


def test_clipped_share_counts_the_values_beyond_the_limits():
    x = heavy_tailed()
    s = dhs.summarise(x)
    limits = compute.limits_of_summary(s)
    assert limits is not None
    below, above = compute.clipped_share(s, limits)
    # numpy: the fraction outside; fine bins are 0.2 mm (or 0.01 %), so values within a bin of
    # a limit may fall either side
    near = np.mean(np.minimum(abs(x - limits.low), abs(x - limits.high)) < 1e-3)
    assert abs(below - np.mean(x < limits.low)) <= near
    assert abs(above - np.mean(x > limits.high)) <= near
    assert above > 0.1


def test_histogram_bars_match_numpy_histogram_of_the_pixels():
    x = heavy_tailed()
    s = dhs.summarise(x)
    h = compute.display_histogram(s, bars=80)
    # every pixel is in a bar or counted beyond the window
    assert h.counts.sum() + h.below + h.above == x.size
    reference, _ = np.histogram(x, bins=h.edges)
    near_edge = np.array(
        [np.sum(np.abs(x - e) < 2e-3) for e in h.edges]
    )  # a fine bin (<= 2 mm here) straddling an edge may go to either bar
    slack = near_edge[:-1] + near_edge[1:]
    assert np.all(np.abs(h.counts - reference) <= slack)


def test_histogram_curves_differ_on_heavy_tails_and_agree_on_gaussian_data():
    heavy = compute.display_histogram(dhs.summarise(heavy_tailed()))
    peak = heavy.counts.max()
    assert np.max(np.abs(heavy.gauss_moments - heavy.gauss_robust)) > 0.5 * peak
    rng = np.random.default_rng(3)
    normal = compute.display_histogram(dhs.summarise(rng.normal(0.0, 0.5, 200_000)))
    peak = normal.counts.max()
    # for Gaussian data, NMAD estimates the standard deviation (Höhle & Höhle 2009)
    assert np.max(np.abs(normal.gauss_moments - normal.gauss_robust)) < 0.03 * peak


def test_gaussian_counts_add_up_to_the_count():
    x = np.linspace(-10, 10, 20_001)
    width = 0.1
    y = compute.gaussian_counts(x, 0.5, 1.2, count=1000, bar_width=width)
    # integral of count x width x pdf over x is count x width: trapezoid rule (numpy)
    assert np.trapezoid(y, x) / width == pytest.approx(1000, rel=1e-6)
    assert not compute.gaussian_counts(x, 0.0, 0.0, count=5, bar_width=1).any()


@pytest.mark.parametrize(
    ("rmse", "grade"),
    # ASPRS Positional Accuracy Standards (2014), Table 7.5 (from memory): class X cm means
    # RMSE_z <= X cm
    [(0.05, "5 cm"), (0.0501, "10 cm"), (0.009, "1 cm"), (3.333, "333.3 cm"), (5.0, ">333.3 cm")],
)
def test_tile_grade_is_the_finest_class_whose_rmse_limit_is_met(rmse, grade):
    assert compute.tile_grade(rmse) == grade


def _tiles() -> list[dict]:
    rows = []
    for i, (median, nmad, rmse) in enumerate(
        [(0.1, 0.2, 0.25), (-2.0, 0.3, 2.1), (0.5, 1.5, 1.6), (0.0, 0.1, 0.1)]
    ):
        stats = {"count": 100, "median": median, "nmad": nmad, "q95_abs": nmad * 2, "rmse": rmse}
        rows.append({"tile": f"t{i}", "status": "ok", "bounds": [i, 0, i + 1, 1], "stats": stats})
    rows.append({"tile": "bad", "status": "failed", "bounds": [4, 0, 5, 1], "stats": {}})
    return rows


def test_worst_tiles_rank_by_abs_median_and_by_spread():
    tiles = _tiles()
    assert compute.worst_tiles(compute.tile_values(tiles, "median"), "median", n=2) == ["t1", "t2"]
    assert compute.worst_tiles(compute.tile_values(tiles, "nmad"), "nmad", n=1) == ["t2"]
    grades = compute.tile_values(tiles, "grade")
    assert [v.grade for v in grades] == ["33.3 cm", "333.3 cm", "333.3 cm", "10 cm", None]
    assert compute.worst_tiles(grades, "grade", n=2) == ["t1", "t2"]
    assert compute.value_limits(compute.tile_values(tiles, "median"), "median") == (-2.0, 2.0)
    with pytest.raises(ValueError, match="statistic"):
        compute.tile_values(tiles, "mode")


@pytest.mark.parametrize(("span", "length"), [(4800, 1000), (10_000, 2000), (333, 50), (41, 10)])
def test_scale_bar_is_a_round_length_under_a_quarter_of_the_map(span, length):
    assert compute.nice_length(span) == length


def test_outline_in_lonlat():
    # EPSG:32632 (UTM zone 32N): central meridian 9 deg E, false easting 500 km (EPSG registry)
    lon, lat = compute.outline_lonlat((499_000, 0, 501_000, 1000), "EPSG:32632")
    assert lon[0] == lon[-1] and lat[0] == lat[-1]
    assert np.mean(lon) == pytest.approx(9.0, abs=0.01)
    assert lat.min() == pytest.approx(0.0, abs=1e-6)
    assert compute.metre_units("EPSG:32632") and not compute.metre_units("EPSG:4326")


def test_strata_rows_take_intervals_from_the_document_or_the_summaries():
    rng = np.random.default_rng(5)
    parts = {
        "slope_deg:0-5": dhs.summarise(rng.normal(0, 1, 500)),
        "slope_deg:5-15": dhs.summarise(rng.normal(1, 2, 500)),
    }
    entries = [{"stratum": k, "stats": dhs.statistics(v)} for k, v in parts.items()]
    entries[0]["confidence_95"] = {"median": [-9.0, 9.0]}
    entries.append({"stratum": "cover_group:x/slope_deg:0-5", "stats": {"count": 3}})
    rows = compute.strata_rows(entries, "slope_deg:", parts)
    assert [r.label for r in rows] == ["0-5", "5-15"]
    assert rows[0].median_ci == (-9.0, 9.0)
    assert list(rows[1].median_ci) == confidence_intervals(parts["slope_deg:5-15"])["median"]
    assert compute.strata_rows(entries[1:], "slope_deg:")[0].median_ci is None


def test_recheck_verdicts_per_tile_and_region_changes():
    recheck = {
        "tiles": [{"tile": "t1", "verdict": "regressed"}, {"tile": "t2", "verdict": "improved"}],
        "regions": [
            {
                "region": "A",
                "verdict": "regressed",
                "before": {"count": 5, "nmad": 0.1, "median": 0.0},
                "after": {"count": 5, "nmad": 0.3, "median": 0.1},
            },
            {"region": "B", "verdict": "new", "before": None, "after": {"count": 1}},
        ],
    }
    verdicts = compute.recheck_tiles(recheck, _tiles())
    assert [v for _, _, v in verdicts] == ["reused", "regressed", "improved", "reused", "reused"]
    assert compute.region_changes(recheck) == [
        {"region": "A", "verdict": "regressed", "nmad": (0.1, 0.3), "median": (0.0, 0.1)}
    ]


# ---- drawn figures -------------------------------------------------------------------------


def _context(tmp_path, x: np.ndarray, regions, tiles=None) -> figures.FigureContext:
    s = dhs.summarise(x)
    document = {"job": {"name": "t"}, "overall": dhs.statistics(s), "tiles": tiles or _tiles()}
    ctx = figures.FigureContext(tmp_path, document, s, {}, regions, "EPSG:32632")
    grid = x[:40_000].reshape(200, 200).copy()
    grid[:20, :20] = np.nan  # a void
    ctx.__dict__["overview"] = (grid, (0.0, 0.0, 5.0, 1.0))  # what read_overview would give
    return ctx


def test_dh_map_colour_norm_outlines_and_missing_tiles(tmp_path):
    x = heavy_tailed()
    regions = [
        ("A", "Alpha", box(0.2, 0.1, 2.0, 0.9)),
        ("B", "Beta", Polygon([(2.5, 0.1), (4.5, 0.2), (3.5, 0.9)])),
        ("C", "outside", box(10, 10, 11, 11)),
    ]
    fig, meta = figures.build_dh_map(_context(tmp_path, x, regions))
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
    ctx = _context(tmp_path, x, [])
    fig, meta = figures.build_histogram(ctx)
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
    fig, _ = figures.build_histogram(ctx)
    assert fig.axes[0].get_yscale() == "linear"


def test_tile_map_colours_each_tile_and_labels_the_worst(tmp_path):
    ctx = _context(tmp_path, heavy_tailed(), [])
    fig, meta = figures.tile_map_builder("median")(ctx)
    ax = fig.axes[0]
    collection = next(c for c in ax.collections if isinstance(c, PatchCollection))
    assert list(collection.get_array()) == [0.1, -2.0, 0.5, 0.0]
    assert (collection.norm.vmin, collection.norm.vmax) == (-2.0, 2.0)
    labels = [t for t in ax.texts if (t.get_gid() or "").startswith("worst:")]
    assert [t.get_gid() for t in labels] == [f"worst:{t}" for t in meta["worst_tiles"]]
    assert meta["worst_tiles"][0] == "t1"
    assert any(p.get_gid() == "no-value:bad" for p in ax.patches)


def test_recheck_figures(tmp_path):
    ctx = _context(tmp_path, heavy_tailed(), [])
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
    fig, meta = figures.build_recheck_map(ctx)
    gids = [p.get_gid() for p in fig.axes[0].patches]
    assert "tile:t1:regressed" in gids and len(gids) == 5
    assert meta["verdicts"] == {"regressed": 1, "reused": 4}
    fig, meta = figures.build_recheck_regions(ctx)
    after = [c for c in fig.axes[1].collections if c.get_gid() == "after:nmad"][0]
    assert after.get_offsets()[0][0] == 0.1


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
        "tiles": _tiles(),
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


@settings(max_examples=40, deadline=None)
@given(
    st.lists(
        st.lists(st.floats(-50, 50, allow_nan=False), min_size=1, max_size=60),
        min_size=1,
        max_size=6,
    )
)
def test_limits_and_histogram_of_merged_tiles_equal_those_of_all_pixels(parts):
    # invariant: what the figures draw depends on the pixels, not on how tiles split them
    merged = dhs.merge_all(dhs.summarise(np.array(p)) for p in parts)
    whole = dhs.summarise(np.concatenate([np.array(p) for p in parts]))
    a, b = compute.limits_of_summary(merged), compute.limits_of_summary(whole)
    assert a is not None and b is not None
    assert (a.low, a.high) == pytest.approx((b.low, b.high), abs=1e-9)
    ha, hb = compute.display_histogram(merged), compute.display_histogram(whole)
    assert np.array_equal(ha.counts, hb.counts) and (ha.below, ha.above) == (hb.below, hb.above)
    assert ha.counts.sum() + ha.below + ha.above == whole.count
