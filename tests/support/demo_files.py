"""Helpers of the demo-archive tests (tests/workers/demo): a tiny archive's options and
reading its GeoTIFFs back."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import rasterio

TINY: dict[str, Any] = {"tiles_x": 2, "tiles_y": 2, "pixels": 40}
FOLDERS = ("release_2026_11", "release_2026_11_update", "lidar_2021", "landcover")
FLOAT32_TOLERANCE_M = 1e-4  # float32 spacing is 3e-5 m at 300 m


def arrays(folder: Path) -> dict[str, np.ndarray]:
    """Band 1 of every GeoTIFF in a folder, by file name."""
    out = {}
    for path in sorted(folder.glob("*.tif")):
        with rasterio.open(path) as src:
            out[path.name] = src.read(1)
    return out


def pixel_centres(src: rasterio.DatasetReader) -> tuple[np.ndarray, np.ndarray]:
    transform = src.transform  # north-up, no rotation
    cols, rows = np.meshgrid(np.arange(src.width) + 0.5, np.arange(src.height) + 0.5)
    return transform.c + cols * transform.a, transform.f + rows * transform.e
