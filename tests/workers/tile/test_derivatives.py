"""Derived terrain parameters against analytic geometry, a hand-worked D8 example and invariants."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from demaudit.workers.tile import derivative_kernels
from demaudit.workers.tile.derivatives import (
    ASPECT,
    NO_WINDOW,
    PARAMETERS,
    PLAN_CURVATURE,
    SLOPE,
    circular_difference_deg,
    curvatures,
    d8_compared,
    d8_directions,
    derived_differences,
    surface_derivatives,
)

DX, DY = 10.0, 8.0  # unequal pixel sides: catches a swapped axis


def coordinates(rows: int, cols: int, dx: float = DX, dy: float = DY) -> tuple[np.ndarray, ...]:
    """East and north of each pixel centre (rows run southwards)."""
    row, col = np.mgrid[0:rows, 0:cols].astype(np.float64)
    return col * dx, -row * dy


def interior(a: np.ndarray) -> np.ndarray:
    return a[1:-1, 1:-1]


@pytest.mark.parametrize("compiled", [True, False])
@pytest.mark.parametrize(("a", "b"), [(0.1, 0.0), (0.0, -0.3), (0.25, 0.4), (-0.7, 0.2)])
def test_plane_slope_and_aspect_are_analytic(a: float, b: float, compiled: bool) -> None:
    # analytic geometry: z = a x + b y has slope atan(hypot(a, b)) and falls towards
    # (-a, -b) (east, north), i.e. aspect atan2(-a, -b) clockwise from north
    x, y = coordinates(12, 15)
    found = surface_derivatives(
        5.0 + a * x + b * y, pixel_size_x_m=DX, pixel_size_y_m=DY, compiled=compiled
    )
    slope = np.degrees(np.arctan(np.hypot(a, b)))
    aspect = np.degrees(np.arctan2(-a, -b)) % 360
    np.testing.assert_allclose(interior(found.slope_deg), slope, atol=1e-9)
    np.testing.assert_allclose(interior(found.aspect_deg), aspect, atol=1e-9)
    np.testing.assert_allclose(interior(found.profile_curvature), 0.0, atol=1e-12)
    assert np.isnan(found.slope_deg[0]).all() and np.isnan(found.slope_deg[:, -1]).all()


@pytest.mark.parametrize("compiled", [True, False])
def test_cone_slope_and_aspect_are_analytic_away_from_the_apex(compiled: bool) -> None:
    # analytic geometry: a cone z = h - k rho has slope atan(k) everywhere but the apex, and
    # falls away from the apex: aspect = atan2(east - east0, north - north0)
    x, y = coordinates(81, 81, 5.0, 5.0)
    x0, y0 = x[40, 40], y[40, 40]
    k = 0.6
    heights = 500.0 - k * np.hypot(x - x0, y - y0)
    found = surface_derivatives(heights, pixel_size_x_m=5.0, pixel_size_y_m=5.0, compiled=compiled)
    away = np.hypot(x - x0, y - y0) >= 10 * 5.0  # 10 pixels from the apex and more
    away[[0, -1], :] = away[:, [0, -1]] = False
    aspect = np.degrees(np.arctan2(x - x0, y - y0)) % 360
    # the 3 x 3 window sees the cone's curvature across the slope: the error falls off with
    # (pixel / distance)^2 (measured 0.063 and 0.030 degrees at 10 pixels, 0.016 and 0.009 at 20)
    slope_error = np.abs(found.slope_deg - np.degrees(np.arctan(k)))
    aspect_error = np.abs(circular_difference_deg(found.aspect_deg, aspect))
    assert slope_error[away].max() < 0.1 and aspect_error[away].max() < 0.05
    far = away & (np.hypot(x - x0, y - y0) >= 20 * 5.0)
    assert slope_error[far].max() < 0.02 and aspect_error[far].max() < 0.01


def test_sphere_cap_curvatures_are_analytic() -> None:
    # analytic geometry: on a sphere of radius R every normal curvature is 1/R (profile), and
    # the contour at horizontal distance rho from the axis is a circle: plan curvature 1/rho
    radius = 2000.0
    x, y = coordinates(101, 101, 2.0, 2.0)
    rho = np.hypot(x - x[50, 50], y - y[50, 50])
    heights = np.sqrt(radius**2 - rho**2)
    plan, profile = curvatures(heights, pixel_size_x_m=2.0, pixel_size_y_m=2.0)
    ring = (rho > 20) & (rho < 90)
    ring[[0, -1], :] = ring[:, [0, -1]] = False
    np.testing.assert_allclose(profile[ring], 1 / radius, rtol=1e-3)
    np.testing.assert_allclose(plan[ring], 1 / rho[ring], rtol=1e-3)


def test_paraboloid_curvatures_are_analytic() -> None:
    # analytic geometry: z = -(x^2 + y^2) / (2 c) has gradient g = rho / c, second derivatives
    # -1/c: profile curvature 1 / (c (1 + g^2)^(3/2)), plan curvature 1 / rho. The finite
    # differences are exact for a quadratic, so only rounding remains
    c = 300.0
    x, y = coordinates(41, 61)
    east, north = x - x[20, 30], y - y[20, 30]
    rho = np.hypot(east, north)
    plan, profile = curvatures(
        -(east**2 + north**2) / (2 * c), pixel_size_x_m=DX, pixel_size_y_m=DY
    )
    inside = np.isfinite(profile) & (rho > 0)
    assert inside.sum() == 39 * 59 - 1  # all but the border and the apex (level)
    g2 = (rho / c) ** 2
    np.testing.assert_allclose(profile[inside], 1 / (c * (1 + g2[inside]) ** 1.5), rtol=1e-9)
    np.testing.assert_allclose(plan[inside], 1 / rho[inside], rtol=1e-9)


def test_equal_surfaces_give_zero_differences_and_full_d8_agreement() -> None:
    rng = np.random.default_rng(3)
    heights = np.cumsum(rng.normal(size=(30, 40)), axis=1) + rng.normal(size=(30, 40))
    heights[7, 9] = np.nan
    one = surface_derivatives(heights, pixel_size_x_m=DX, pixel_size_y_m=DY)
    other = surface_derivatives(heights.copy(), pixel_size_x_m=DX, pixel_size_y_m=DY)
    diffs = derived_differences(one, other, min_slope_deg=0.0)
    assert set(diffs) == set(PARAMETERS)
    for name, diff in diffs.items():
        finite = np.isfinite(diff)
        assert finite.sum() > 900, name
        assert np.all(diff[finite] == 0.0), name
    compared, agree = d8_compared(one, other)
    assert compared.sum() == 28 * 38 - 9  # the NaN's window leaves 9 pixels out
    assert np.array_equal(compared, agree)


@pytest.mark.parametrize("compiled", [True, False])
def test_d8_hand_worked_five_by_five(compiled: bool) -> None:
    # Hand computation (1 m pixels, diagonal sqrt(2)), heights falling 1 m per column eastwards:
    # reference rows are 10 9 8 7 6, so every interior pixel drains east: code 3 (E) x 9.
    # The test equals it except a pit of 5 m at the centre (2, 2). Steepest drops in the test:
    #   (1,1) z 9: SE to the pit (9-5)/sqrt2 = 2.83 > E 1        -> 4 (SE)
    #   (1,2) z 8: S  to the pit 8-5 = 3                          -> 5 (S)
    #   (1,3) z 7: SW to the pit 2/sqrt2 = 1.41 > E 1             -> 6 (SW)
    #   (2,1) z 9: E  to the pit 4                                -> 3 (E)  agrees
    #   (2,2) z 5: no lower neighbour                             -> 0
    #   (2,3) z 7: W  to the pit 2 > E 1                          -> 7 (W)
    #   (3,1) z 9: NE to the pit 2.83                             -> 2 (NE)
    #   (3,2) z 8: N  to the pit 3                                -> 1 (N)
    #   (3,3) z 7: NW to the pit 1.41 > E 1                       -> 8 (NW)
    # so 1 of the 9 compared pixels agrees; the 16 border pixels have no complete window.
    reference = np.tile(np.array([10.0, 9, 8, 7, 6]), (5, 1))
    test = reference.copy()
    test[2, 2] = 5.0
    size = {"pixel_size_x_m": 1.0, "pixel_size_y_m": 1.0}
    codes = d8_directions(test, **size)
    assert codes[1:4, 1:4].tolist() == [[4, 5, 6], [3, 0, 7], [2, 1, 8]]
    assert (d8_directions(reference, **size)[1:4, 1:4] == 3).all()
    assert (codes[[0, -1], :] == NO_WINDOW).all() and (codes[:, [0, -1]] == NO_WINDOW).all()
    compared, agree = d8_compared(
        surface_derivatives(test, **size, compiled=compiled),
        surface_derivatives(reference, **size, compiled=compiled),
    )
    assert (compared.sum(), agree.sum()) == (9, 1)
    assert agree[2, 1]


def test_aspect_difference_wraps_around_north() -> None:
    # 359 and 1 degrees are 2 degrees apart across north, not 358
    found = circular_difference_deg(
        np.array([1.0, 359.0, 90.0, 0.0, 10.0]), np.array([359.0, 1.0, 270.0, 180.0, np.nan])
    )
    np.testing.assert_allclose(found[:4], [2.0, -2.0, 180.0, 180.0])
    assert np.isnan(found[4])


def test_aspect_and_plan_curvature_only_where_the_reference_is_steep_enough() -> None:
    x, y = coordinates(10, 10)
    gentle = surface_derivatives(0.02 * x + 0.001 * x**2, pixel_size_x_m=DX, pixel_size_y_m=DY)
    bumped = surface_derivatives(0.03 * x + 0.001 * x**2, pixel_size_x_m=DX, pixel_size_y_m=DY)
    slope = interior(gentle.slope_deg)
    threshold = float(np.median(slope))
    diffs = derived_differences(bumped, gentle, min_slope_deg=threshold)
    for name in (ASPECT, PLAN_CURVATURE):
        assert np.array_equal(np.isfinite(interior(diffs[name])), slope > threshold), name
    assert np.isfinite(interior(diffs[SLOPE])).all()


def test_unknown_parameter_is_named() -> None:
    flat = surface_derivatives(np.zeros((4, 4)), pixel_size_x_m=1.0, pixel_size_y_m=1.0)
    with pytest.raises(ValueError, match="'roughness'"):
        derived_differences(flat, flat, parameters=("roughness",), min_slope_deg=5.0)


@settings(max_examples=30, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    shift=st.floats(-1000, 1000, allow_nan=False),
)
def test_a_vertical_shift_changes_no_derived_parameter(seed: int, shift: float) -> None:
    # invariant: derivatives depend on height differences only, so test = reference + constant
    # has zero derived differences (to rounding) and the same D8 directions
    rng = np.random.default_rng(seed)
    heights = rng.normal(scale=20.0, size=(9, 11)).cumsum(axis=0)
    size = {"pixel_size_x_m": DX, "pixel_size_y_m": DY}
    reference = surface_derivatives(heights, **size)
    shifted = surface_derivatives(heights + shift, **size)
    diffs = derived_differences(shifted, reference, min_slope_deg=1.0)
    np.testing.assert_allclose(interior(diffs[SLOPE]), 0.0, atol=1e-6)
    finite = np.isfinite(diffs[ASPECT])
    np.testing.assert_allclose(diffs[ASPECT][finite], 0.0, atol=1e-6)
    same = interior(reference.d8) == interior(shifted.d8)
    # a D8 tie or a near-zero drop may flip under rounding of (z + shift); rare
    assert same.mean() > 0.9


@settings(max_examples=30, deadline=None)
@given(a=st.floats(0, 360, allow_nan=False), b=st.floats(0, 360, allow_nan=False))
def test_circular_difference_is_within_a_half_turn_and_consistent(a: float, b: float) -> None:
    d = float(circular_difference_deg(np.array([a]), np.array([b]))[0])
    assert -180 < d <= 180
    assert np.isclose(np.cos(np.radians(d)), np.cos(np.radians(a - b)), atol=1e-9)
    assert np.isclose(np.sin(np.radians(d)), np.sin(np.radians(a - b)), atol=1e-9)


@pytest.mark.skipif(not derivative_kernels.AVAILABLE, reason="numba not installed")
@pytest.mark.parametrize("integer", [False, True])
def test_compiled_sweep_matches_the_numpy_functions(integer: bool) -> None:
    # integer heights make D8 ties and level windows: both paths must settle them alike
    rng = np.random.default_rng(11)
    heights = rng.normal(scale=3.0, size=(40, 50)).cumsum(axis=0)
    if integer:
        heights = np.round(heights / 4)
    heights[5, 5:9] = np.nan
    heights[20, 0] = np.nan
    size = {"pixel_size_x_m": DX, "pixel_size_y_m": DY}
    fast = surface_derivatives(heights, **size)
    slow = surface_derivatives(heights, **size, compiled=False)
    for name in ("slope_deg", "aspect_deg", "plan_curvature", "profile_curvature"):
        a, b = getattr(fast, name), getattr(slow, name)
        assert np.array_equal(np.isnan(a), np.isnan(b)), name
        np.testing.assert_allclose(a, b, rtol=1e-12, atol=1e-12, equal_nan=True, err_msg=name)
    assert np.array_equal(fast.d8, slow.d8)


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 2**32 - 1))
def test_swapping_test_and_reference_negates_every_difference(seed: int) -> None:
    # invariant: test - reference = -(reference - test); aspect on the circle too (away from a
    # half turn, where (-180, 180] keeps +180 both ways)
    rng = np.random.default_rng(seed)
    a = rng.normal(scale=5.0, size=(12, 14)).cumsum(axis=1)
    b = a + rng.normal(scale=0.5, size=a.shape)
    size = {"pixel_size_x_m": DX, "pixel_size_y_m": DY}
    one, other = surface_derivatives(a, **size), surface_derivatives(b, **size)
    forward = derived_differences(one, other, min_slope_deg=0.0)
    backward = derived_differences(other, one, min_slope_deg=0.0)
    for name in PARAMETERS:
        f, g = forward[name], backward[name]
        both = np.isfinite(f) & np.isfinite(g)
        if name == ASPECT:
            both &= np.abs(f) < 179.9
        np.testing.assert_allclose(f[both], -g[both], atol=1e-9, err_msg=name)
