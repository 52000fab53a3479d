"""The tiles' derived comparisons merged into summary.json's derivatives section."""

from __future__ import annotations

import pytest

from demaudit.workers.stats import summary as dh_summary
from demaudit.workers.stats.derivatives_merge import DerivativesAccumulator, tile_entry
from demaudit.workers.tile.derivative_pass import SUMMARY_SCALE, DerivativeOptions
from demaudit.workers.tile.derivatives import PARAMETERS, SLOPE
from demaudit.workers.tile.one_pass import ALL
from tests.workers.tile.test_derivative_pass import compare, terrain


def test_merged_section_adds_tiles_exactly() -> None:
    parts = [terrain(seed) for seed in (5, 6)]
    found = [compare(*p) for p in parts]
    acc = DerivativesAccumulator(DerivativeOptions(), region_ids=["north", "west"])
    for i, f in enumerate(found):
        acc.add(f"t{i}", f)
    acc.add("failed", None)
    section = acc.section({"north": "North"})
    for name in PARAMETERS:
        merged = dh_summary.merge_all(f.summaries[name].areas["north"] for f in found)
        region = section[name]["regions"][0]
        assert (region["region"], region["name"]) == ("north", "North")
        assert region["stats"]["count"] == merged.count
        scale = SUMMARY_SCALE[name]  # summarised in units of scale, reported in UNITS
        assert region["stats"]["median"] == dh_summary.statistics(merged)["median"] * scale
        assert section[name]["bin_width"] == pytest.approx(2e-4 * scale)
        assert set(region["stats"]) == set(dh_summary.STAT_KEYS)
        strata = {s["stratum"] for s in section[name]["overall"]["strata"]}
        assert "landcover:open" in strata and "slope_deg:5-15" in strata
    agree = sum(f.d8[ALL][0] for f in found)
    compared = sum(f.d8[ALL][1] for f in found)
    assert section["d8_agreement"]["overall"] == {
        "agree": agree,
        "compared": compared,
        "share": agree / compared,
    }
    assert section["tiles"] == 2
    entry = tile_entry(found[0])
    assert entry is not None and entry[SLOPE]["count"] == found[0].summaries[SLOPE].areas[ALL].count
