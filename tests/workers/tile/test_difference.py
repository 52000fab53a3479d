"""The dh overview's block means agree with xarray's coarsen (reference library)."""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr

from demaudit.workers.tile import kernels
from demaudit.workers.tile.difference import block_mean, difference


@pytest.mark.parametrize(("shape", "factor"), [((1601, 1597), 3), ((40, 40), 4), ((7, 5), 1)])
def test_block_mean_equals_xarray_coarsen(shape, factor):
    rng = np.random.default_rng(1)
    values = rng.normal(size=shape).astype(np.float32)
    values[values > 1.2] = np.nan  # voids, some whole blocks
    values[:factor, :factor] = np.nan
    got = block_mean(values, factor)
    # reference: xarray.DataArray.coarsen(boundary="pad").mean(), NaN skipped
    want = xr.DataArray(values, dims=("y", "x")).coarsen(y=factor, x=factor, boundary="pad")
    want = want.mean().values
    assert got.shape == want.shape
    assert np.allclose(got, want, rtol=1e-6, atol=1e-6, equal_nan=True)


def former_block_mean(dh: np.ndarray, factor: int) -> np.ndarray:
    """block_mean as first written (NaN-padded copy, then where): the bits to keep."""
    rows = -(-dh.shape[0] // factor)
    cols = -(-dh.shape[1] // factor)
    padded = np.full((rows * factor, cols * factor), np.nan)
    padded[: dh.shape[0], : dh.shape[1]] = dh
    blocks = padded.reshape(rows, factor, cols, factor)
    valid = np.isfinite(blocks)
    total = np.where(valid, blocks, 0.0).sum(axis=(1, 3))
    count = valid.sum(axis=(1, 3))
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(count > 0, total / np.maximum(count, 1), np.nan).astype(np.float32)


@pytest.mark.parametrize("compiled", [True, False])
@pytest.mark.parametrize(
    ("shape", "factor"),
    [
        ((1501, 1499), 8),
        ((64, 64), 8),
        ((9, 7), 3),
        ((40, 50), 1),
        ((33, 70), 5),
        ((50, 61), 13),
        ((70, 300), 20),
        ((130, 400), 128),
        ((5, 30), 8),
        ((30, 5), 8),  # one block across: numpy path
    ],
)
def test_block_mean_keeps_its_former_bits(shape, factor, compiled, monkeypatch):
    if compiled and not kernels.AVAILABLE:
        pytest.skip("numba is not installed")
    monkeypatch.setattr(kernels, "AVAILABLE", compiled)
    rng = np.random.default_rng(2)
    dh = rng.normal(0.2, 3.0, shape) * 10.0 ** rng.integers(-6, 3, shape)
    dh[rng.random(shape) < 0.1] = np.nan
    dh[rng.random(shape) < 0.01] = np.inf
    dh[:factor, :factor] = np.nan
    np.testing.assert_array_equal(block_mean(dh, factor), former_block_mean(dh, factor))


@pytest.mark.parametrize("compiled", [True, False])
def test_block_mean_of_float32_keeps_its_former_bits(compiled, monkeypatch):
    if compiled and not kernels.AVAILABLE:
        pytest.skip("numba is not installed")
    monkeypatch.setattr(kernels, "AVAILABLE", compiled)
    rng = np.random.default_rng(3)
    dh = rng.normal(100.0, 30.0, (203, 157)).astype(np.float32)
    dh[rng.random(dh.shape) < 0.1] = np.nan
    np.testing.assert_array_equal(block_mean(dh, 8), former_block_mean(dh, 8))


@pytest.mark.parametrize(
    "dtypes", [(np.float32, np.float32), (np.float32, np.float64), (np.float64, np.float64)]
)
def test_the_compiled_difference_is_numpys_float64_subtract(dtypes, monkeypatch):
    # numpy's subtract with dtype float64 is the reference, NaN and infinities included
    rng = np.random.default_rng(3)
    test = (rng.normal(300, 50, (37, 53)) + rng.normal(0, 1e-3, (37, 53))).astype(dtypes[0])
    reference = (test + rng.normal(0, 0.3, test.shape)).astype(dtypes[1])
    test[3, :7], reference[5, 2:9], test[0, 0], reference[1, 1] = np.nan, np.nan, np.inf, -np.inf
    got = difference(test, reference)
    monkeypatch.setattr(kernels, "AVAILABLE", False)
    want = difference(test, reference)
    assert got.dtype == want.dtype == np.float64
    np.testing.assert_array_equal(got, want)
    assert np.array_equal(got, np.subtract(test, reference, dtype=np.float64), equal_nan=True)
