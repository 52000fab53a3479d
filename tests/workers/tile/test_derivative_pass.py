"""One tile's derived comparison: dh's keyed summaries of each difference, D8 counts."""

from __future__ import annotations

import numpy as np
import pytest

from demaudit.workers.stats import summary as dh_summary
from demaudit.workers.tile.derivative_pass import (
    FLOW_DIRECTION,
    SUMMARY_SCALE,
    DerivativeOptions,
    TileDerivatives,
    tile_derivatives,
)
from demaudit.workers.tile.derivatives import (
    ASPECT,
    PARAMETERS,
    SLOPE,
    derived_differences,
    surface_derivatives,
)
from demaudit.workers.tile.one_pass import ALL, summarise_pixels
from demaudit.workers.tile.strata import ClassInfo

CLASSES = (
    ClassInfo(1, "open", "non_vegetated"),
    ClassInfo(2, "forest", "vegetated"),
    ClassInfo(9, "water", "excluded"),
)
EDGES = (0.0, 5.0, 15.0, 30.0)
PIXEL = (5.0, 5.0)


def terrain(seed: int, shape: tuple[int, int] = (60, 70)) -> tuple[np.ndarray, ...]:
    rng = np.random.default_rng(seed)
    row, col = np.mgrid[0 : shape[0], 0 : shape[1]].astype(np.float64)
    reference = 40 * np.sin(row / 9) + 30 * np.cos(col / 7) + 0.5 * row
    test = reference + rng.normal(scale=0.4, size=shape)
    landcover = rng.choice([1.0, 2.0, 9.0, np.nan], size=shape, p=[0.5, 0.3, 0.1, 0.1])
    return test, reference, landcover


def masks(shape: tuple[int, int]) -> dict[str, np.ndarray]:
    row, col = np.mgrid[0 : shape[0], 0 : shape[1]]
    return {"north": row < shape[0] // 2, "west": col < shape[1] // 3}


def compare(
    test: np.ndarray,
    reference: np.ndarray,
    landcover: np.ndarray | None,
    options: DerivativeOptions | None = None,
) -> TileDerivatives:
    return tile_derivatives(
        test,
        reference,
        landcover=landcover,
        region_masks=masks(test.shape),
        classes=CLASSES,
        slope_edges=EDGES,
        pixel_size_m=PIXEL,
        options=options or DerivativeOptions(),
        overview_factor=8,
    )


def test_a_test_equal_to_the_reference_gives_zero_differences_everywhere() -> None:
    _, reference, landcover = terrain(1)
    found = compare(reference.copy(), reference, landcover)
    assert set(found.summaries) == set(PARAMETERS)
    for name, summaries in found.summaries.items():
        for area, s in summaries.areas.items():
            assert s.count > 0, (name, area)
            assert (s.minimum, s.maximum, s.m2) == (0.0, 0.0, 0.0), (name, area)
    for area, (agree, compared) in found.d8.items():
        assert compared > 0 and agree == compared, area


def test_summaries_are_those_of_the_differences_with_dh_keys() -> None:
    test, reference, landcover = terrain(2)
    found = compare(test, reference, landcover)
    size = {"pixel_size_x_m": PIXEL[0], "pixel_size_y_m": PIXEL[1]}
    diffs = derived_differences(
        surface_derivatives(test, **size),
        surface_derivatives(reference, **size),
        min_slope_deg=5.0,
    )
    kept = ~np.isin(landcover, [9.0])  # excluded class leaves every statistic
    for name in (SLOPE, ASPECT):
        values = diffs[name][kept & np.isfinite(diffs[name])]
        whole = found.summaries[name].areas[ALL]
        assert whole.count == values.size
        # summarised in units of SUMMARY_SCALE: the linear bins are that many times 0.2 mm wide
        scale = SUMMARY_SCALE[name]
        stats = dh_summary.statistics(whole)
        assert stats["median"] * scale == pytest.approx(np.median(values), abs=2e-4 * scale)
        assert stats["max"] * scale == pytest.approx(values.max(), rel=1e-12)
        # the same area and stratum keys as dh's summaries of the tile
        dh_keys = summarise_pixels(
            test - reference,
            reference=reference,
            landcover=landcover,
            region_masks=masks(test.shape),
            classes=CLASSES,
            slope_edges=EDGES,
            pixel_size_m=PIXEL,
        )
        assert found.summaries[name].areas.keys() == dh_keys.areas.keys()
        assert found.summaries[name].strata[ALL].keys() == dh_keys.strata[ALL].keys()
    # the border pixels have no window: nothing from them
    assert found.summaries[SLOPE].areas[ALL].count <= np.count_nonzero(kept[1:-1, 1:-1])


def test_d8_counts_leave_out_excluded_classes_and_follow_regions() -> None:
    test, reference, landcover = terrain(3)
    found = compare(test, reference, landcover)
    agree_all, compared_all = found.d8[ALL]
    interior = np.zeros(test.shape, bool)
    interior[1:-1, 1:-1] = True
    assert compared_all == np.count_nonzero(interior & (landcover != 9.0))
    north_agree, north_compared = found.d8["north"]
    assert north_compared == np.count_nonzero(
        interior & (landcover != 9.0) & masks(test.shape)["north"]
    )
    assert 0 < agree_all < compared_all and north_agree <= agree_all


def test_only_the_parameters_asked_for() -> None:
    test, reference, _ = terrain(4)
    found = compare(test, reference, None, DerivativeOptions(parameters=(SLOPE,)))
    assert list(found.summaries) == [SLOPE] and found.d8 == {}
    found = compare(test, reference, None, DerivativeOptions(parameters=(FLOW_DIRECTION,)))
    assert found.summaries == {} and found.d8[ALL][1] > 0
