"""The job's outputs of the derived comparison (I/O edge): the running merge
(workers/stats/derivatives_merge.py) feeding summary.json's ``derivatives`` section and the tile
records, and decimated overviews in ``results.zarr/derivatives_overview``: one variable per
compared parameter (test - reference, block mean 1:factor, in
the UNITS of workers/tile/derivatives.py), on the dh overview's grid and CRS, written as tiles
finish.

The aspect overview averages differences already wrapped to (-180, 180]: read it where they are
small (a block mixing +179 and -179 averages to about 0).
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import rioxarray  # noqa: F401 - registers the .rio accessor
import xarray as xr
import zarr

from demaudit.workers.outputs.layout import DERIVATIVES_OVERVIEW_GROUP
from demaudit.workers.outputs.writers import OverviewLayout, blank_overview, overview_axes
from demaudit.workers.stats.derivatives_merge import (
    DerivativesAccumulator,
    derivative_cautions,
    tile_entry,
)
from demaudit.workers.tile.derivative_pass import DerivativeOptions, TileDerivatives
from demaudit.workers.tile.derivatives import UNITS
from demaudit.workers.tile.task import TileResult

GROUP = DERIVATIVES_OVERVIEW_GROUP


class JobDerivatives:
    """The derived comparison of one job as tiles finish: merge, overviews, tile records."""

    def __init__(
        self,
        options: DerivativeOptions,
        *,
        region_ids: Sequence[str],
        store_path: Path,
        layout: OverviewLayout | None,
    ) -> None:
        self.merged = DerivativesAccumulator(options, region_ids=region_ids)
        self.overviews = DerivativeOverviews(store_path, layout, options.compared)

    @classmethod
    def start(
        cls,
        options: DerivativeOptions | None,
        *,
        region_ids: Sequence[str],
        store_path: Path,
        layout: OverviewLayout | None,
    ) -> JobDerivatives | None:
        """None when the spec asks for no derivatives."""
        if options is None:
            return None
        return cls(options, region_ids=region_ids, store_path=store_path, layout=layout)

    def add(self, result: TileResult) -> dict[str, Any]:
        """Fold one tile's result in and write its overview blocks; what its tile record adds
        (``derivatives``: each parameter's statistics over the tile and its D8 agreement)."""
        self.merged.add(result.tile_id, result.derivatives)
        self.overviews.write(result.tile_id, result.derivatives)
        entry = tile_entry(result.derivatives)
        return {} if entry is None else {"derivatives": entry}

    def section(self, names: Mapping[str, str]) -> dict[str, Any]:
        """summary.json's ``derivatives`` (names: region id -> name); its cautions are
        derivative_cautions(section)."""
        return self.merged.section(names)

    def attach(self, document: dict[str, Any], names: Mapping[str, str]) -> None:
        """Put the ``derivatives`` section and its cautions into summary.json's document."""
        document["derivatives"] = self.section(names)
        document["cautions"] += derivative_cautions(document["derivatives"])


class DerivativeOverviews:
    """Writes the derived-difference overviews of one job into the (partial) results store at
    ``store_path``; nothing without a layout (tiles not on one grid) or parameters."""

    def __init__(
        self, store_path: Path, layout: OverviewLayout | None, parameters: Sequence[str]
    ) -> None:
        self.path = Path(store_path) / GROUP
        self.layout = layout if parameters else None
        self.parameters = tuple(parameters)
        self._arrays: dict[str, Any] = {}
        if self.layout is not None:
            _create(Path(store_path), self.layout, self.parameters)

    def write(self, tile_id: str, found: TileDerivatives | None) -> None:
        """Write one tile's blocks in place (no other block is read)."""
        layout = self.layout
        if layout is None or found is None or tile_id not in layout.offsets:
            return
        row, col = layout.offsets[tile_id]
        for name, block in found.overviews.items():
            if name not in self.parameters:
                continue
            rows = slice(row, min(row + block.shape[0], layout.height))
            cols = slice(col, min(col + block.shape[1], layout.width))
            self._array(name)[rows, cols] = block[
                : rows.stop - rows.start, : cols.stop - cols.start
            ]

    def _array(self, name: str) -> Any:
        if name not in self._arrays:
            self._arrays[name] = zarr.open_array(
                str(self.path / name), mode="r+", use_consolidated=False
            )
        return self._arrays[name]


def _create(store_path: Path, layout: OverviewLayout, parameters: Sequence[str]) -> None:
    """The empty group: one NaN-filled variable per parameter, georeferenced like dh_overview."""
    from affine import Affine

    x, y = overview_axes(layout)
    variables = {}
    for name in parameters:
        blank = blank_overview(layout)
        variable = xr.DataArray(blank, dims=("y", "x"), coords={"y": y, "x": x}, name=name)
        variable.attrs.update(
            long_name=f"{name}, test minus reference (block mean)", units=UNITS[name]
        )
        variable.encoding["_FillValue"] = np.float32(np.nan)
        variables[name] = variable
    dataset = xr.Dataset(variables)
    dataset = dataset.rio.write_crs(layout.crs).rio.write_transform(Affine(*layout.transform))
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=".*Consolidated metadata.*")
        dataset.to_zarr(  # type: ignore[call-overload]
            store_path, group=GROUP, mode="w", compute=False, zarr_format=3, consolidated=False
        )
