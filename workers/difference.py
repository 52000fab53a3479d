"""dh = test - reference: the sign used everywhere in demaudit."""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray


def difference(test: NDArray[np.float64], reference: NDArray[np.float64]) -> NDArray[np.float64]:
    """dh = test - reference (metres, both on one grid and one vertical datum).

    NaN where either is nodata.
    """
    if test.shape != reference.shape:
        raise ValueError(f"test {test.shape} and reference {reference.shape} are not on one grid")
    return test - reference


def block_mean(dh: NDArray[np.float64], factor: int) -> NDArray[np.float32]:
    """Mean of each factor x factor block, ignoring NaN (NaN where a block has no value).

    Edge blocks that are cut short average what they hold. Used for the dh overview map.
    """
    rows = -(-dh.shape[0] // factor)
    cols = -(-dh.shape[1] // factor)
    finite = np.isfinite(dh)
    zeroed = np.zeros((rows * factor, cols * factor))  # padding and NaN add nothing
    np.copyto(zeroed[: dh.shape[0], : dh.shape[1]], dh, where=finite)
    valid = np.zeros(zeroed.shape, dtype=np.uint8)
    valid[: dh.shape[0], : dh.shape[1]] = finite
    del finite
    total = zeroed.reshape(rows, factor, cols, factor).sum(axis=(1, 3))
    count = valid.reshape(rows, factor, cols, factor).sum(axis=(1, 3), dtype=np.int64)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(count > 0, total / np.maximum(count, 1), np.nan).astype(np.float32)
