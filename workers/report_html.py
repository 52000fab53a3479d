"""A self-contained HTML page of a job's results, for people: written next to summary.json.

Plain HTML and CSS, no script; figures are linked by relative path so the folder can be copied.
"""

from __future__ import annotations

import html
from collections.abc import Iterable, Mapping, Sequence
from pathlib import Path
from typing import Any

REPORT_NAME = "report.html"
_COLUMNS = ("count", "median", "nmad", "q683_abs", "q95_abs", "rmse", "mean", "std")

_STYLE = """
body { font-family: sans-serif; margin: 2em; max-width: 70em; color: #222; }
table { border-collapse: collapse; margin: 0.5em 0 1.5em; }
th, td { border: 1px solid #bbb; padding: 0.25em 0.6em; text-align: right; }
th:first-child, td:first-child { text-align: left; }
.caution { background: #fff4d6; border-left: 0.4em solid #e0a800; padding: 0.5em 1em; }
.met { color: #176b2c; font-weight: bold; } .not-met { color: #a11; font-weight: bold; }
img { max-width: 100%; border: 1px solid #ddd; margin: 0.5em 0; }
"""


def write_report(out_dir: Path, document: Mapping[str, Any]) -> Path:
    """Write report.html for the summary document into out_dir."""
    path = Path(out_dir) / REPORT_NAME
    path.write_text(render(document), encoding="utf-8")
    return path


def render(document: Mapping[str, Any]) -> str:
    """The page as a string."""
    job = document["job"]
    parts = [
        f"<h1>DEM audit: {_e(job['name'])}</h1>",
        f"<p>dh = {_e(document['sign'])}, in {_e(document['units'])}s. "
        f"Started {_e(job.get('started'))}, finished {_e(job.get('finished'))}, "
        f"{_e(job.get('software'))}.</p>",
        _cautions(document.get("cautions", [])),
        "<h2>Whole job and regions</h2>",
        _stats_table(
            [("(all)", document["overall"])]
            + [(f"{r['region']} {r.get('name', '')}", r["stats"]) for r in document["regions"]]
        ),
        "<h2>By land cover and slope (whole job)</h2>",
        _stats_table(
            [(s["stratum"], s["stats"]) for s in document["overall_detail"].get("strata", [])]
        ),
    ]
    if document.get("checkpoints"):
        parts += _checkpoints(document["checkpoints"])
    if document.get("coregistration"):
        parts += _coregistration(document["coregistration"])
    parts += [f'<img src="{_e(name)}" alt="{_e(name)}">' for name in document.get("figures", [])]
    parts += _tile_problems(document.get("tiles", []))
    body = "\n".join(parts)
    return (
        "<!DOCTYPE html>\n<html lang='en'><head><meta charset='utf-8'>"
        f"<title>DEM audit {_e(job['name'])}</title><style>{_STYLE}</style></head>"
        f"<body>\n{body}\n</body></html>\n"
    )


def _e(value: object) -> str:
    return html.escape("" if value is None else str(value))


def _number(value: object) -> str:
    if value is None:
        return "–"
    if isinstance(value, int):
        return f"{value:,}"
    if isinstance(value, float):
        return f"{value:.3f}"
    return _e(value)


def _stats_table(rows: Iterable[tuple[str, Mapping[str, Any]]]) -> str:
    head = "".join(f"<th>{c}</th>" for c in ("", *_COLUMNS))
    lines = [
        "<tr><td>"
        + _e(name)
        + "</td>"
        + "".join(f"<td>{_number(stats.get(c))}</td>" for c in _COLUMNS)
        + "</tr>"
        for name, stats in rows
    ]
    return f"<table><tr>{head}</tr>{''.join(lines)}</table>"


def _cautions(cautions: Sequence[str]) -> str:
    items = "".join(f"<li>{_e(c)}</li>" for c in cautions)
    return f'<div class="caution"><strong>Cautions</strong><ul>{items}</ul></div>'


def _met(value: object) -> str:
    if value is True:
        return '<span class="met">met</span>'
    if value is False:
        return '<span class="not-met">not met</span>'
    return "not decided"


def _verdict(grade: Mapping[str, Any]) -> str:
    """met / not met; a standard that states a figure instead (NSSDA without a required
    accuracy) shows its sentence; the Edition 2 VVA as found."""
    if grade.get("met") is None and grade.get("statement"):
        return _e(grade["statement"])
    parts = [_met(grade.get("met"))]
    if grade.get("statement"):
        parts.append(_e(grade["statement"]))
    if "vva_rmse_v_as_found_m" in grade:
        parts.append(f"VVA (RMSE_V, as found): {_number(grade['vva_rmse_v_as_found_m'])} m")
    return "<br>".join(parts)


def _checkpoints(cp: Mapping[str, Any]) -> list[str]:
    counts = cp["counts"]
    rows = []
    for grade in cp.get("grading", []):
        checks = "; ".join(
            f"{c['measure']} {_number(c['value'])} ≤ {_number(c['threshold'])}: "
            + (_e(c["note"]) if c.get("note") else _met(c["met"]))
            for c in grade.get("checks", [])
        )
        warnings = "<br>".join(_e(w) for w in grade.get("warnings", []))
        rows.append(
            f"<tr><td>{_e(grade['standard'])} {_e(grade.get('class', ''))}</td>"
            f"<td>{_verdict(grade)}</td><td>{checks}</td>"
            f"<td>{_e(grade.get('best_class_met') or '')}</td><td>{warnings}</td></tr>"
        )
    assumptions = "".join(f"<li>{_e(a)}</li>" for a in cp.get("cautions", []))
    return [
        "<h2>Checkpoints</h2>",
        f"<p>Cover groups of the checkpoints:</p><ul>{assumptions}</ul>" if assumptions else "",
        f"<p>{counts['used']} of {counts['read']} checkpoints used, {counts['rejected']} "
        f"rejected (reasons in {_e(cp.get('residuals_file'))}).</p>",
        _stats_table(
            [("checkpoints", cp["stats"])]
            + [(k, v) for k, v in cp.get("by_cover_group", {}).items()]
        ),
        "<table><tr><th>standard</th><th>grade</th><th>checks</th><th>best class met</th>"
        f"<th>warnings</th></tr>{''.join(rows)}</table>",
    ]


def _coregistration(c: Mapping[str, Any]) -> list[str]:
    if c.get("status") != "ok":
        return ["<h2>Co-registration</h2>", f"<p>Not estimated: {_e(c.get('reason'))}</p>"]
    outliers = ", ".join(c.get("outlier_tiles", {}) or []) or "none"
    return [
        "<h2>Co-registration</h2>",
        f"<p>{_e(c.get('method'))}: shift east {_number(c['east_m'])} m, north "
        f"{_number(c['north_m'])} m, vertical {_number(c['vertical_m'])} m. "
        f"Outlier tiles: {_e(outliers)}.</p>",
    ]


def _tile_problems(tiles: Sequence[Mapping[str, Any]]) -> list[str]:
    bad = [t for t in tiles if t.get("status") not in ("ok", "not_audited")]
    if not bad:
        return []
    rows = "".join(
        f"<tr><td>{_e(t['tile'])}</td><td>{_e(t['status'])}</td><td>{_e(t.get('reason'))}</td></tr>"
        for t in bad
    )
    return [
        "<h2>Tiles not audited</h2>",
        f"<table><tr><th>tile</th><th>status</th><th>reason</th></tr>{rows}</table>",
    ]
