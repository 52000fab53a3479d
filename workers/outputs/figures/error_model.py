"""The error model's figure: the empirical variogram of standardised dh with the fitted model,
and NMAD of stable dh by slope with the fitted sigma(slope, curvature) averaged over each bin
(summary.json ``error_model``; after co-registration too when the run has it)."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np
from matplotlib.axes import Axes
from matplotlib.figure import Figure

from demaudit.workers.uncertainty.variogram import Component, VariogramModel

ERROR_MODEL_NAME = "error_model.png"
COLOURS = ("#1f5fa8", "#c2571a")
MIN_DRAWN_COUNT = 100  # bins of fewer stable pixels are not drawn


def _models(document: Mapping[str, Any]) -> list[tuple[str, Mapping[str, Any]]]:
    found = []
    if document.get("error_model"):
        found.append(("dh", document["error_model"]))
    after = ((document.get("coregistration") or {}).get("after") or {}).get("error_model")
    if after:
        found.append(("after co-registration", after))
    return found


def _variogram_panel(ax: Axes, label: str, m: Mapping[str, Any], colour: str) -> None:
    """Empirical semivariances and the fitted model."""
    emp = m["empirical_variogram"]
    h = np.asarray(emp["distance_m"], dtype=np.float64)
    ax.plot(h, emp["gamma"], "o", ms=3.5, color=colour, label=f"empirical ({label})")
    if not h.size:
        return
    model = VariogramModel(
        float(m["nugget"]),
        tuple(Component(float(c["range_m"]), float(c["sill"])) for c in m["components"]),
    )
    grid = np.geomspace(max(h.min(), 1e-3), h.max(), 200)
    ranges = ", ".join(f"{c['range_m']:.0f} m" for c in m["components"]) or "none"
    ax.plot(
        grid,
        model.gamma(grid),
        "-",
        color=colour,
        lw=1.2,
        label=f"fit: nugget {m['nugget']:.2f}, ranges {ranges}",
    )


def _sigma_panel(ax: Axes, label: str, m: Mapping[str, Any], colour: str) -> None:
    """NMAD per slope bin and the model averaged over each bin's pixels."""
    s = m["sigma_by_slope"]
    bins = [b for b in s["bins"] if b["count"] >= MIN_DRAWN_COUNT]
    centre = [b["centre_deg"] for b in bins]
    ax.plot(
        centre,
        [b["nmad"] for b in bins],
        "o",
        ms=3.5,
        color=colour,
        label=f"NMAD per 2-degree bin ({label})",
    )
    formula = f"{s['a_m']:.2f} + {s['b_m']:.2f} tan(slope)^{s['c']:.2f}"
    if s.get("d_m"):
        formula += f" + {s['d_m']:.2f} |curv|"
    ax.plot(centre, [b["model_m"] for b in bins], "-", color=colour, lw=1.2, label=formula)


def _labels(left: Axes, right: Axes) -> None:
    left.set_xscale("log")
    left.set_xlabel("distance (m)")
    left.set_ylabel("semivariance of standardised dh")
    left.set_title("Spatial correlation (stable terrain)", fontsize=10)
    left.legend(fontsize=7, loc="lower right")
    right.set_xlabel("slope (degrees)")
    right.set_ylabel("sigma of dh (m)")
    right.set_title("Spread of dh by slope (stable terrain)", fontsize=10)
    right.legend(fontsize=7, loc="upper left")


def build_error_model(ctx: Any) -> tuple[Figure, dict[str, Any]] | None:
    """Variogram and sigma(slope) panels; None when the job has no error model."""
    models = _models(ctx.document)
    if not models:
        return None
    fig = Figure(figsize=(10, 4.2), dpi=100)
    left = fig.add_axes((0.07, 0.13, 0.40, 0.75))
    right = fig.add_axes((0.57, 0.13, 0.40, 0.75))
    for (label, m), colour in zip(models, COLOURS, strict=False):
        _variogram_panel(left, label, m, colour)
        _sigma_panel(right, label, m, colour)
    _labels(left, right)
    meta = {
        "shows": "empirical variogram of standardised dh with the fitted spherical model; NMAD "
        "of stable dh by slope with the fitted sigma(slope, curvature) averaged over each bin",
        "models": [label for label, _ in models],
    }
    return fig, meta
