"""Formatting shared by the sections of report.html: escaping, numbers, intervals, the
statistics table, the cautions box, grade verdicts and the before/after change table."""

from __future__ import annotations

import html
from collections.abc import Iterable, Mapping, Sequence
from typing import Any

COLUMNS = ("count", "median", "nmad", "q683_abs", "q95_abs", "rmse", "mean", "std")


def esc(value: object) -> str:
    return html.escape("" if value is None else str(value))


def number(value: object) -> str:
    if value is None:
        return "–"
    if isinstance(value, int):
        return f"{value:,}"
    if isinstance(value, float):
        return f"{value:.3f}"
    return esc(value)


def stats_table(rows: Iterable[tuple[str, Mapping[str, Any]]]) -> str:
    head = "".join(f"<th>{c}</th>" for c in ("", *COLUMNS))
    lines = [
        "<tr><td>"
        + esc(name)
        + "</td>"
        + "".join(f"<td>{number(stats.get(c))}</td>" for c in COLUMNS)
        + "</tr>"
        for name, stats in rows
    ]
    return f"<table><tr>{head}</tr>{''.join(lines)}</table>"


def cautions_box(cautions: Sequence[str]) -> str:
    items = "".join(f"<li>{esc(c)}</li>" for c in cautions)
    return f'<div class="caution"><strong>Cautions</strong><ul>{items}</ul></div>'


def met(value: object) -> str:
    if value is True:
        return '<span class="met">met</span>'
    if value is False:
        return '<span class="not-met">not met</span>'
    return "not decided"


def verdict(grade: Mapping[str, Any]) -> str:
    """met / not met; a standard that states a figure instead (NSSDA without a required
    accuracy) shows its sentence; the Edition 2 VVA as found."""
    if grade.get("met") is None and grade.get("statement"):
        return esc(grade["statement"])
    parts = [met(grade.get("met"))]
    if grade.get("statement"):
        parts.append(esc(grade["statement"]))
    if "vva_rmse_v_as_found_m" in grade:
        parts.append(f"VVA (RMSE_V, as found): {number(grade['vva_rmse_v_as_found_m'])} m")
    return "<br>".join(parts)


def grading_table(grades: Sequence[Mapping[str, Any]]) -> str:
    """One row per standard: its verdict or sentence, the checks, best class met, warnings."""
    rows = []
    for grade in grades:
        checks = "; ".join(
            f"{c['measure']} {number(c['value'])} ≤ {number(c['threshold'])}: "
            + (esc(c["note"]) if c.get("note") else met(c["met"]))
            for c in grade.get("checks", [])
        )
        warnings = "<br>".join(esc(w) for w in grade.get("warnings", []))
        rows.append(
            f"<tr><td>{esc(grade['standard'])} {esc(grade.get('class', ''))}</td>"
            f"<td>{verdict(grade)}</td><td>{checks}</td>"
            f"<td>{esc(grade.get('best_class_met') or '')}</td><td>{warnings}</td></tr>"
        )
    return (
        "<table><tr><th>standard</th><th>grade</th><th>checks</th><th>best class met</th>"
        f"<th>warnings</th></tr>{''.join(rows)}</table>"
    )


def interval(ci: object) -> str:
    if not isinstance(ci, Sequence) or len(ci) != 2:
        return "–"
    return f"[{number(ci[0])}, {number(ci[1])}]"


def change_table(
    what: str, rows: Sequence[Mapping[str, Any]], key: str, *, why: bool = False
) -> str:
    if not rows:
        return ""
    head = (
        f"<tr><th>{what}</th><th>verdict</th><th>median before</th><th>median after</th>"
        "<th>NMAD before</th><th>NMAD after</th><th>flags</th>"
        + ("<th>why recomputed</th>" if why else "")
        + "</tr>"
    )
    lines = []
    for row in rows:
        before, after = row.get("before") or {}, row.get("after") or {}
        verdict = esc(row["verdict"])
        lines.append(
            f"<tr><td>{esc(row[key])}</td><td class='{verdict}'>{verdict}</td>"
            f"<td>{number(before.get('median'))}</td><td>{number(after.get('median'))}</td>"
            f"<td>{number(before.get('nmad'))}</td><td>{number(after.get('nmad'))}</td>"
            f"<td>{esc('; '.join(row.get('flags') or []))}</td>"
            + (f"<td>{esc(row.get('why'))}</td>" if why else "")
            + "</tr>"
        )
    return f"<table>{head}{''.join(lines)}</table>"
