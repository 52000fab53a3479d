"""The spec's opt-in ``derivatives:`` section."""

from __future__ import annotations

import pytest

from demaudit.workers.errors import SpecError
from demaudit.workers.spec import parse_spec

BASE = {"name": "x", "test": {"tiles": ["a.tif"]}, "reference": {"tiles": ["b.tif"]}}


def test_derivatives_are_off_unless_asked_for_and_default_to_every_parameter() -> None:
    assert parse_spec(BASE).derivatives is None
    section = parse_spec(BASE | {"derivatives": {}}).derivatives
    assert section is not None and section.min_slope_deg == 5.0
    assert section.parameters == [
        "slope",
        "aspect",
        "plan_curvature",
        "profile_curvature",
        "flow_direction",
    ]


@pytest.mark.parametrize(
    ("section", "named"),
    [
        ({"parameters": ["slope", "slope"]}, "derivatives.parameters"),
        ({"parameters": ["roughness"]}, "derivatives.parameters.0"),
        ({"parameters": []}, "derivatives.parameters"),
        ({"min_slope_deg": 90}, "derivatives.min_slope_deg"),
        ({"threshold": 3}, "derivatives.threshold"),
    ],
)
def test_a_bad_derivatives_section_names_the_field(section: dict, named: str) -> None:
    with pytest.raises(SpecError, match=named.replace(".", r"\.")):
        parse_spec(BASE | {"derivatives": section})
