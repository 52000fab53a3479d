"""Reading a results folder for the figures (figures/context.py): the overview's display blocks
equal the dh overview's own block means."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from demaudit.workers.outputs.figures import FigureContext
from demaudit.workers.outputs.figures.context import display_blocks
from demaudit.workers.tile.difference import block_mean


@pytest.mark.parametrize("factor", [1, 2, 3, 7])
def test_display_blocks_equal_the_tile_block_means(factor):
    rng = np.random.default_rng(4)
    values = rng.normal(0, 1, (103, 97))
    values[rng.random(values.shape) < 0.2] = np.nan
    values[:14, :14] = np.nan  # whole blocks without a value
    expected = values if factor == 1 else block_mean(values, factor)
    assert np.allclose(display_blocks(values, factor), expected, equal_nan=True, atol=1e-6)


def _exact_block_means(values, factor):
    """Per block: the mean of its finite values by math.fsum (correctly rounded), and the sum
    of their magnitudes (for the rounding bound of a plain summation)."""
    rows, cols = -(-values.shape[0] // factor), -(-values.shape[1] // factor)
    mean, magnitude = np.full((rows, cols), np.nan), np.zeros((rows, cols))
    for r in range(rows):
        for c in range(cols):
            block = values[r * factor : (r + 1) * factor, c * factor : (c + 1) * factor]
            finite = block[np.isfinite(block)].astype(np.float64)
            if finite.size:
                mean[r, c] = math.fsum(finite) / finite.size
                magnitude[r, c] = np.abs(finite).sum() / finite.size
    return mean, magnitude


@settings(max_examples=60, deadline=None)
@given(
    shape=st.tuples(st.integers(1, 40), st.integers(1, 40)),
    factor=st.integers(2, 12),
    seed=st.integers(0, 2**16),
    dtype=st.sampled_from([np.float32, np.float64]),
)
def test_display_blocks_are_the_block_means_within_summation_rounding(shape, factor, seed, dtype):
    # heavy-tailed values, voids and infinities (left out, as NaN is); the bound is the
    # classic one of a plain summation of n terms: n * eps * sum |x| (Higham, Accuracy and
    # Stability of Numerical Algorithms, 2nd ed., section 4.2), divided by the count
    rng = np.random.default_rng(seed)
    values = (rng.standard_cauchy(shape) * 10.0 ** rng.integers(-3, 4)).astype(dtype)
    values[rng.random(shape) < 0.3] = np.nan
    values[rng.random(shape) < 0.02] = np.inf
    got = display_blocks(values, factor)
    exact, magnitude = _exact_block_means(values, factor)
    assert got.dtype == np.float64
    np.testing.assert_array_equal(np.isnan(got), np.isnan(exact))
    bound = factor**2 * np.finfo(np.float64).eps * magnitude
    finite = ~np.isnan(exact)
    assert (np.abs(got[finite] - exact[finite]) <= bound[finite]).all()


def test_context_reads_the_tile_statistics_from_the_spec(tmp_path):
    spec = {"figures": {"tile_statistics": ["rmse", "grade"]}}
    ctx = FigureContext(tmp_path, {"job": {"name": "t", "spec": spec}})
    assert ctx.tile_statistics == ("rmse", "grade")
    assert FigureContext(tmp_path, {"job": {"name": "t"}}).tile_statistics == (
        "median",
        "nmad",
        "grade",
    )


@pytest.mark.parametrize(
    ("shape", "chunks", "factor"),
    [
        ((40, 30), (7, 7), 3),
        ((41, 29), (10, 10), 4),
        ((16, 16), (16, 16), 5),
        ((9, 9), (2, 3), 1),
        ((100, 20), (25, 20), 6),  # band of 75 rows: three chunk rows, each read once
        ((90, 20), (7, 20), 11),  # lcm 77 beyond 8 chunk rows: bands of 11 rows
    ],
)
def test_a_stored_mosaic_read_in_bands_gives_the_blocks_of_the_whole(
    tmp_path, shape, chunks, factor
) -> None:
    import zarr

    from demaudit.workers.outputs.figures.context import stored_display_blocks

    rng = np.random.default_rng(3)
    values = rng.normal(0.2, 0.5, shape).astype(np.float32)
    values[rng.random(shape) < 0.2] = np.nan
    values[: chunks[0] + 1, :] = np.nan  # a band with no value at all
    stored = zarr.create_array(str(tmp_path / "dh"), shape=shape, chunks=chunks, dtype="float32")
    stored[...] = values
    whole = display_blocks(values.astype(np.float64), factor)
    np.testing.assert_array_equal(stored_display_blocks(stored, factor), whole)


def test_bands_end_on_chunk_rows_within_bounds() -> None:
    """Bands end on chunk rows (each chunk decoded once) unless that takes more than 8 chunk
    rows or 2^24 cells (a national mosaic is wide): then the smallest multiple of factor."""
    from demaudit.workers.outputs.figures.context import band_rows

    assert band_rows(250, 6, width=4_000) == 750  # the 256-tile map: three chunk rows
    assert band_rows(250, 400, width=4_000) == 2_000  # eight chunk rows
    assert band_rows(250, 400, width=280_000) == 400  # 2,000 rows would be 560 million cells
    assert band_rows(7, 11, width=20) == 11  # lcm 77 is eleven chunk rows
    assert band_rows(16, 4, width=10) == 16
