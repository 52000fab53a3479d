"""Put the reference on the test tile's grid: reproject and resample (pure, in memory)."""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray
from rasterio import crs as rasterio_crs
from rasterio.enums import Resampling
from rasterio.warp import reproject

from workers.grid import Grid

_RESAMPLING = {
    "nearest": Resampling.nearest,
    "bilinear": Resampling.bilinear,
    "cubic": Resampling.cubic,
    "average": Resampling.average,
}


def onto_grid(
    source: NDArray[np.float64], source_grid: Grid, target: Grid, *, resampling: str = "bilinear"
) -> NDArray[np.float64]:
    """Resample source (NaN = nodata) from source_grid onto target; NaN where nothing covers.

    Heights are not changed, only moved: units and vertical datum are the source's.
    """
    out = np.full(target.shape, np.nan)
    reproject(
        source=np.ascontiguousarray(source),
        destination=out,
        src_transform=source_grid.affine,
        src_crs=rasterio_crs.CRS.from_wkt(source_grid.crs),
        src_nodata=np.nan,
        dst_transform=target.affine,
        dst_crs=rasterio_crs.CRS.from_wkt(target.crs),
        dst_nodata=np.nan,
        resampling=_RESAMPLING[resampling],
    )
    return out
