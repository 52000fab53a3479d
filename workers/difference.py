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
    padded = np.full((rows * factor, cols * factor), np.nan)
    padded[: dh.shape[0], : dh.shape[1]] = dh
    blocks = padded.reshape(rows, factor, cols, factor)
    valid = np.isfinite(blocks)
    total = np.where(valid, blocks, 0.0).sum(axis=(1, 3))
    count = valid.sum(axis=(1, 3))
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(count > 0, total / np.maximum(count, 1), np.nan).astype(np.float32)
