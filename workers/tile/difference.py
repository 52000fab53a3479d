"""dh = test - reference: the sign used everywhere in demaudit."""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

from demaudit.workers.tile import kernels


def difference(test: NDArray[np.floating], reference: NDArray[np.floating]) -> NDArray[np.float64]:
    """dh = test - reference (metres, both on one grid and one vertical datum), in float64
    whatever their dtypes (float32 heights are subtracted as the float64 values they hold).

    NaN where either is nodata.
    """
    if test.shape != reference.shape:
        raise ValueError(f"test {test.shape} and reference {reference.shape} are not on one grid")
    floats = (np.float32, np.float64)
    if kernels.AVAILABLE and test.ndim == 2 and test.dtype in floats and reference.dtype in floats:
        out = np.empty(test.shape, dtype=np.float64)
        kernels.difference_sweep(test, reference, out)  # about 3x faster than numpy's cast
        return out
    return np.subtract(test, reference, dtype=np.float64)


def block_mean(dh: NDArray[np.float64], factor: int) -> NDArray[np.float32]:
    """Mean of each factor x factor block, ignoring NaN (NaN where a block has no value).

    Edge blocks that are cut short average what they hold. Used for the dh overview map.
    """
    rows = -(-dh.shape[0] // factor)
    cols = -(-dh.shape[1] // factor)
    if kernels.AVAILABLE and cols > 1 and factor <= 128 and dh.dtype in (np.float32, np.float64):
        total = np.zeros((rows, cols))
        count = np.zeros((rows, cols), dtype=np.int64)
        kernels.block_sweep(dh, factor, total, count, np.empty(factor))
    else:
        total, count = _block_sums(dh, factor, rows, cols)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(count > 0, total / np.maximum(count, 1), np.nan).astype(np.float32)


def _block_sums(
    dh: NDArray[np.floating], factor: int, rows: int, cols: int
) -> tuple[NDArray[np.float64], NDArray[np.int64]]:
    """Sum and count of the finite values of each block (numpy; the compiled loop adds in the
    same order, so both give the same bits)."""
    finite = np.isfinite(dh)
    zeroed = np.zeros((rows * factor, cols * factor))  # padding and NaN add nothing
    np.copyto(zeroed[: dh.shape[0], : dh.shape[1]], dh, where=finite)
    valid = np.zeros(zeroed.shape, dtype=np.uint8)
    valid[: dh.shape[0], : dh.shape[1]] = finite
    del finite
    total = zeroed.reshape(rows, factor, cols, factor).sum(axis=(1, 3))
    count = valid.reshape(rows, factor, cols, factor).sum(axis=(1, 3), dtype=np.int64)
    return total, count
