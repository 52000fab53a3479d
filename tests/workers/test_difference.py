"""The dh overview's block means agree with xarray's coarsen (reference library)."""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr

from workers.difference import block_mean


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
