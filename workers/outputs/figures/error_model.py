"""The error model's figure: the empirical variogram of standardised dh with the fitted model,
and NMAD of stable dh by slope with the fitted sigma(slope) (summary.json ``error_model``; after
co-registration too when the run has it)."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np
from matplotlib.figure import Figure

from demaudit.workers.uncertainty.variogram import Component, VariogramModel

ERROR_MODEL_NAME = "error_model.png"


def _models(document: Mapping[str, Any]) -> list[tuple[str, Mapping[str, Any]]]:
    found = []
    if document.get("error_model"):
        found.append(("dh", document["error_model"]))
    after = ((document.get("coregistration") or {}).get("after") or {}).get("error_model")
    if after:
        found.append(("after co-registration", after))
    return found


def build_error_model(ctx: Any) -> tuple[Figure, dict[str, Any]] | None:
    """Variogram and sigma(slope) panels; None when the job has no error model."""
    models = _models(ctx.document)
    if not models:
        return None
    fig = Figure(figsize=(10, 4.2), dpi=100)
    left = fig.add_axes((0.07, 0.13, 0.40, 0.75))
    right = fig.add_axes((0.57, 0.13, 0.40, 0.75))
    for (label, m), colour in zip(models, ("#1f5fa8", "#c2571a"), strict=False):
        emp = m["empirical_variogram"]
        h = np.asarray(emp["distance_m"], dtype=np.float64)
        left.plot(h, emp["gamma"], "o", ms=3.5, color=colour, label=f"empirical ({label})")
        model = VariogramModel(
            float(m["nugget"]),
            tuple(Component(float(c["range_m"]), float(c["sill"])) for c in m["components"]),
        )
        if h.size:
            grid = np.geomspace(max(h.min(), 1e-3), h.max(), 200)
            ranges = ", ".join(f"{c['range_m']:.0f} m" for c in m["components"]) or "none"
            left.plot(
                grid,
                model.gamma(grid),
                "-",
                color=colour,
                lw=1.2,
                label=f"fit: nugget {m['nugget']:.2f}, ranges {ranges}",
            )
        bins = m["sigma_by_slope"]["bins"]
        centre = [b["centre_deg"] for b in bins if b["count"] >= 100]
        right.plot(
            centre,
            [b["nmad"] for b in bins if b["count"] >= 100],
            "o",
            ms=3.5,
            color=colour,
            label=f"NMAD per 2-degree bin ({label})",
        )
        slope = np.linspace(0, max(centre or [1.0]), 100)
        s = m["sigma_by_slope"]
        right.plot(
            slope,
            s["a_m"] + s["b_m"] * np.tan(np.radians(slope)) ** s["c"],
            "-",
            color=colour,
            lw=1.2,
            label=f"{s['a_m']:.2f} + {s['b_m']:.2f} tan(slope)^{s['c']:.2f}",
        )
    left.set_xscale("log")
    left.set_xlabel("distance (m)")
    left.set_ylabel("semivariance of standardised dh")
    left.set_title("Spatial correlation (stable terrain)", fontsize=10)
    left.legend(fontsize=7, loc="lower right")
    right.set_xlabel("slope (degrees)")
    right.set_ylabel("sigma of dh (m)")
    right.set_title("Spread of dh by slope (stable terrain)", fontsize=10)
    right.legend(fontsize=7, loc="upper left")
    meta = {
        "shows": "empirical variogram of standardised dh with the fitted spherical model; NMAD "
        "of stable dh by slope with the fitted sigma(slope)",
        "models": [label for label, _ in models],
    }
    return fig, meta
