"""The uncertainty section of report.html (workers/outputs/report_html.py places it): the error
model's components, sigma by slope, and each region's standard errors (summary.json
``error_model`` and ``regions[].uncertainty``; after co-registration too when the run has it)."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from html import escape
from typing import Any

MIN_SHOWN_COUNT = 100  # slope bins of fewer stable pixels are not listed


def _n(value: object, digits: int = 3) -> str:
    if isinstance(value, bool) or value is None:
        return "–"
    if isinstance(value, int):
        return f"{value:,}"
    if isinstance(value, float):
        return f"{value:.{digits}f}"
    return escape(str(value))


def _table(head: Sequence[str], rows: Sequence[Sequence[str]]) -> str:
    top = "".join(f"<th>{escape(h)}</th>" for h in head)
    body = "".join("<tr>" + "".join(f"<td>{c}</td>" for c in row) + "</tr>" for row in rows)
    return f"<table><tr>{top}</tr>{body}</table>"


def _model(label: str, m: Mapping[str, Any]) -> list[str]:
    """The sigma model and the variogram's components."""
    s = m.get("sigma_model") or m.get("sigma_by_slope") or {}
    fit = m.get("fit") or {}
    parts = [
        f"<p><b>{escape(label)}</b>: sigma_dh = {_n(s.get('a_m'))} + {_n(s.get('b_m'))} "
        f"tan(slope)^{_n(s.get('c'), 2)} + {_n(s.get('d_m'))} |curvature| m, fitted on "
        f"{_n(m.get('stable_pixels'))} stable pixels of {_n(m.get('tiles'))} tiles; variogram of "
        f"the standardised dh from {_n(m.get('samples'))} samples "
        f"(fit R² {_n(fit.get('r_squared'))}).</p>"
    ]
    rows = [["nugget", "–", _n(m.get("nugget"))]] + [
        [escape(str(c["model"])), _n(float(c["range_m"]), 0), _n(c["sill"])]
        for c in m.get("components") or []
    ]
    parts.append(_table(["component", "range (m)", "sill (standardised)"], rows))
    bins = [
        b for b in (m.get("sigma_by_slope") or {}).get("bins", []) if b["count"] >= MIN_SHOWN_COUNT
    ]
    parts.append(
        _table(
            ["slope (degrees)", "stable pixels", "NMAD (m)", "model (m)"],
            [
                [f"{b['low']:.0f}–{b['high']:.0f}", _n(b["count"]), _n(b["nmad"]), _n(b["model_m"])]
                for b in bins
            ],
        )
    )
    return parts


def _regions(regions: Sequence[Mapping[str, Any]]) -> list[str]:
    """Each region's standard errors next to the independent-pixel one."""
    rows = []
    for r in regions:
        u, stats = r.get("uncertainty") or {}, r.get("stats") or {}
        interval = u.get("median_95_m")
        shown = f"[{_n(interval[0])}, {_n(interval[1])}]" if interval else "–"
        rows.append(
            [
                escape(f"{r['region']} {r.get('name', '')}".strip()),
                _n(stats.get("mean")),
                _n(u.get("mean_se_m")),
                _n(stats.get("median")),
                _n(u.get("median_se_m")),
                shown,
                _n(u.get("independent_pixels_mean_se_m"), 4),
            ]
        )
    head = ["region", "mean (m)", "mean_se_m", "median (m)", "median_se_m"]
    head += ["median 95 % (m)", "SE if pixels were independent (m)"]
    return [_table(head, rows)] if rows else []


def uncertainty_section(document: Mapping[str, Any]) -> list[str]:
    """The section's HTML parts; none when the job has no error model."""
    found = []
    if document.get("error_model"):
        found.append(("dh", document["error_model"], document.get("regions") or []))
    after = (document.get("coregistration") or {}).get("after") or {}
    if after.get("error_model"):
        found.append(("after co-registration", after["error_model"], after.get("regions") or []))
    parts: list[str] = []
    for label, model, regions in found:
        parts += _model(label, model) + _regions(regions)
    if parts:
        parts.insert(
            0,
            "<p>Standard errors from the spatially correlated error model of stable "
            "terrain (Rolstad, Haug &amp; Denby 2009); the regions' intervals above "
            "assume independent pixels.</p>",
        )
    return parts
