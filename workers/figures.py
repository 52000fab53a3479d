"""Figures of a job for people: a dh map and the distribution of dh, by matplotlib (Agg).

Reads only what the job already wrote (results.zarr and the summary document), so it runs at the
end of a job or later on any results folder.
"""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path
from typing import Any

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import zarr  # noqa: E402

from workers.difference import block_mean  # noqa: E402
from workers.writers import ZARR_NAME  # noqa: E402

MAP_NAME = "dh_map.png"
STRATA_NAME = "dh_by_stratum.png"
SHIFTS_NAME = "tile_shifts.png"
MAP_PIXELS = 700


def write_figures(out_dir: Path, document: Mapping[str, Any]) -> list[str]:
    """Write the figures that the results allow; return their file names."""
    written = []
    if _dh_map(out_dir, document):
        written.append(MAP_NAME)
    if _by_stratum(out_dir, document):
        written.append(STRATA_NAME)
    if _tile_shifts(out_dir, document):
        written.append(SHIFTS_NAME)
    return written


def _dh_map(out_dir: Path, document: Mapping[str, Any]) -> bool:
    try:
        # read with zarr into this process: through xarray and Dask, the blocks would be
        # computed on whatever cluster the caller has open and shipped back
        group: Any = zarr.open_group(str(Path(out_dir) / ZARR_NAME / "dh_overview"), mode="r")
        dh, x, y = group["dh"][...], group["x"][...], group["y"][...]
    except (KeyError, FileNotFoundError, OSError):
        return False
    factor = -(-max(dh.shape) // MAP_PIXELS)  # no more map pixels than the figure shows
    values = block_mean(np.asarray(dh, dtype=np.float64), max(factor, 1))
    overall = document.get("overall") or {}
    if not overall.get("count"):
        return False
    centre, spread = overall["median"], max(3 * overall["nmad"], 0.05)
    fig, ax = plt.subplots(figsize=(7, 6), layout="constrained")
    image = ax.imshow(
        values,
        cmap="RdBu_r",
        vmin=centre - spread,
        vmax=centre + spread,
        extent=(float(x.min()), float(x.max()), float(y.min()), float(y.max())),
        interpolation="nearest",
    )
    for tile in document.get("tiles", []):
        if tile.get("status") == "failed" and tile.get("bounds"):
            left, bottom, right, top = tile["bounds"]
            ax.add_patch(
                plt.Rectangle(
                    (left, bottom),
                    right - left,
                    top - bottom,
                    fill=False,
                    hatch="xx",
                    edgecolor="black",
                    linewidth=0.8,
                )
            )
    fig.colorbar(image, ax=ax, label="dh = test - reference (m), median +- 3 NMAD")
    ax.set_title(f"{document['job']['name']}: dh overview (block means)")
    ax.set_xlabel("easting (m)")
    ax.set_ylabel("northing (m)")
    ax.ticklabel_format(useOffset=False, style="plain")
    fig.savefig(Path(out_dir) / MAP_NAME, dpi=110)
    plt.close(fig)
    return True


def _by_stratum(out_dir: Path, document: Mapping[str, Any]) -> bool:
    strata = (document.get("overall_detail") or {}).get("strata") or []
    rows = [s for s in strata if s["stats"].get("count")]
    if not rows:
        return False
    labels = [
        s["stratum"].replace("cover_group:", "").replace("slope_deg:", "slope ") for s in rows
    ]
    medians = np.array([s["stats"]["median"] for s in rows])
    nmads = np.array([s["stats"]["nmad"] for s in rows])
    fig, ax = plt.subplots(figsize=(8, 0.35 * len(rows) + 1.5), layout="constrained")
    y = np.arange(len(rows))
    ax.errorbar(medians, y, xerr=nmads, fmt="o", color="black", ecolor="grey", capsize=3)
    ax.axvline(0.0, color="grey", linewidth=0.8)
    ax.set_yticks(y, labels)
    ax.invert_yaxis()
    ax.set_xscale("symlog", linthresh=1.0)
    ax.set_xlabel("median dh (m), bars: +- NMAD")
    ax.set_title("dh by land cover and slope (whole job)")
    fig.savefig(Path(out_dir) / STRATA_NAME, dpi=110)
    plt.close(fig)
    return True


def _tile_shifts(out_dir: Path, document: Mapping[str, Any]) -> bool:
    records = [
        (t["bounds"], t["coregistration"])
        for t in document.get("tiles", [])
        if (t.get("coregistration") or {}).get("status") == "ok" and t.get("bounds")
    ]
    if not records:
        return False
    outliers = set((document.get("coregistration") or {}).get("outlier_tiles") or {})
    ids = [
        t["tile"]
        for t in document["tiles"]
        if (t.get("coregistration") or {}).get("status") == "ok" and t.get("bounds")
    ]
    x = np.array([(b[0] + b[2]) / 2 for b, _ in records])
    y = np.array([(b[1] + b[3]) / 2 for b, _ in records])
    u = np.array([r["east_m"] for _, r in records])
    v = np.array([r["north_m"] for _, r in records])
    colour = ["crimson" if i in outliers else "black" for i in ids]
    fig, ax = plt.subplots(figsize=(7, 6), layout="constrained")
    ax.quiver(x, y, u, v, color=colour, angles="xy")
    ax.set_aspect("equal")
    ax.set_title("per-tile horizontal shift of the test model (red: outlier tiles)")
    ax.set_xlabel("easting (m)")
    ax.set_ylabel("northing (m)")
    ax.ticklabel_format(useOffset=False, style="plain")
    fig.savefig(Path(out_dir) / SHIFTS_NAME, dpi=110)
    plt.close(fig)
    return True
