"""The spec's ``figures:`` section: which tile maps to draw (no statistic depends on it)."""

from __future__ import annotations

import pytest

from demaudit.workers.errors import SpecError
from demaudit.workers.outputs.figures.compute import DEFAULT_TILE_STATISTICS, TILE_STATISTICS
from demaudit.workers.spec import parse_spec

BASE = {"name": "x", "test": {"tiles": ["a.tif"]}, "reference": {"tiles": ["b.tif"]}}


def test_default_tile_maps_are_the_figures_default() -> None:
    spec = parse_spec(BASE)
    assert tuple(spec.figures.tile_statistics) == DEFAULT_TILE_STATISTICS
    dumped = spec.model_dump(mode="json")["figures"]["tile_statistics"]
    assert dumped == list(DEFAULT_TILE_STATISTICS)  # what the figures read from summary.json


def test_every_figure_statistic_is_accepted_and_an_empty_list_too() -> None:
    spec = parse_spec(BASE | {"figures": {"tile_statistics": list(TILE_STATISTICS)}})
    assert tuple(spec.figures.tile_statistics) == TILE_STATISTICS
    assert parse_spec(BASE | {"figures": {"tile_statistics": []}}).figures.tile_statistics == []


@pytest.mark.parametrize(
    ("section", "named"),
    [
        ({"tile_statistics": ["median", "median"]}, "figures.tile_statistics"),
        ({"tile_statistics": ["mode"]}, "figures.tile_statistics.0"),
        ({"dpi": 300}, "figures.dpi"),
    ],
)
def test_bad_figure_options_name_the_field(section, named) -> None:
    with pytest.raises(SpecError, match=named):
        parse_spec(BASE | {"figures": section})
