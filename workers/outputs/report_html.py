"""A self-contained HTML page of a job's results, for people: written next to summary.json.

Plain HTML and CSS, no script, nothing fetched: the figures are embedded as data URIs, so the
page alone can be mailed, archived or printed (a print stylesheet keeps figures and tables whole
on their pages). :func:`render` is pure (the document and the figures' bytes in, a string out);
:func:`write_report` reads the figure files the document lists.
"""

from __future__ import annotations

import base64
import html
from collections.abc import Iterable, Mapping, Sequence
from pathlib import Path
from typing import Any

from demaudit.workers.outputs.layout import REPORT_NAME
from demaudit.workers.uncertainty.report import uncertainty_section

_COLUMNS = ("count", "median", "nmad", "q683_abs", "q95_abs", "rmse", "mean", "std")

_STYLE = """
body { font-family: sans-serif; margin: 2em; max-width: 72em; color: #222; }
nav { font-size: 0.9em; margin: 0 0 1.5em; } nav a { margin-right: 0.8em; }
table { border-collapse: collapse; margin: 0.5em 0 1.5em; font-size: 0.9em; }
th, td { border: 1px solid #bbb; padding: 0.25em 0.6em; text-align: right; }
th:first-child, td:first-child { text-align: left; }
.caution { background: #fff4d6; border-left: 0.4em solid #e0a800; padding: 0.5em 1em; }
.met { color: #176b2c; font-weight: bold; } .not-met { color: #a11; font-weight: bold; }
.regressed { color: #a11; font-weight: bold; } .improved { color: #176b2c; }
figure { margin: 1em 0 2em; } figcaption { font-size: 0.85em; color: #444; max-width: 60em; }
img { max-width: 100%; border: 1px solid #ddd; }
@media print {
  body { margin: 0; max-width: none; font-size: 10pt; }
  nav { display: none; }
  h2 { break-before: auto; break-after: avoid; }
  figure, table, .caution { break-inside: avoid; }
  img { max-width: 17cm; border: none; }
  a { color: inherit; text-decoration: none; }
}
"""


def write_report(out_dir: Path, document: Mapping[str, Any]) -> Path:
    """Write report.html for the summary document into out_dir, its figures embedded."""
    images = {}
    for name in figure_names(document):
        try:
            images[name] = (Path(out_dir) / name).read_bytes()
        except OSError:
            continue  # a figure that is not there is left out, not linked
    path = Path(out_dir) / REPORT_NAME
    path.write_text(render(document, images=images), encoding="utf-8")
    return path


def figure_names(document: Mapping[str, Any]) -> list[str]:
    """The figure files of the document (``figures``: a mapping name -> metadata, or a list)."""
    return list(document.get("figures") or [])


#: the sections of the page: (anchor, heading)
SECTIONS = (
    ("overall", "Whole job"),
    ("regions", "Regions"),
    ("tiles", "Tiles"),
    ("strata", "By land cover and slope"),
    ("checkpoints", "Checkpoints"),
    ("coregistration", "Co-registration"),
    ("derivatives", "Derived parameters"),
    ("uncertainty", "Uncertainty (error model)"),
    ("recheck", "Re-check"),
    ("other-figures", "Other figures"),
    ("sources", "Sources"),
)
#: which section shows which figure; a figure not listed here goes to "Other figures"
FIGURE_SECTIONS = {
    "dh_map.png": "overall",
    "dh_histogram.png": "overall",
    "tile_median.png": "tiles",
    "tile_nmad.png": "tiles",
    "tile_grade.png": "tiles",
    "dh_by_stratum.png": "strata",
    "tile_shifts.png": "coregistration",
    "recheck_tiles.png": "recheck",
    "recheck_regions.png": "recheck",
    "error_model.png": "uncertainty",
}


def render(document: Mapping[str, Any], *, images: Mapping[str, bytes] | None = None) -> str:
    """The page as a string; figures whose bytes are given are embedded, others left out."""
    images = images or {}
    job = document["job"]
    figures = _Figures(document, images)
    sections = {
        "overall": _overall(document)
        + figures.of("overall")
        + _indicative(document.get("grading_indicative") or []),
        "regions": _regions(document.get("regions") or []),
        "tiles": figures.of("tiles") + _tile_problems(document.get("tiles", [])),
        "strata": _strata(document) + figures.of("strata"),
        "checkpoints": _checkpoints(document["checkpoints"]) if document.get("checkpoints") else [],
        "coregistration": (
            _coregistration(document["coregistration"]) if document.get("coregistration") else []
        )
        + figures.of("coregistration"),
        "derivatives": _derivatives(document.get("derivatives") or {}),
        "uncertainty": uncertainty_section(document) + figures.of("uncertainty"),
        "recheck": _recheck(document["recheck"]) + figures.of("recheck")
        if document.get("recheck")
        else [],
        "other-figures": figures.rest(),
        "sources": _sources(document),
    }
    present = [(anchor, title) for anchor, title in SECTIONS if sections[anchor]]
    nav = " ".join(f'<a href="#{a}">{_e(t)}</a>' for a, t in present)
    parts = [
        f"<h1>DEM audit: {_e(job['name'])}</h1>",
        f"<p>dh = {_e(document['sign'])}, in {_e(document['units'])}s. "
        f"Started {_e(job.get('started'))}, finished {_e(job.get('finished'))}, "
        f"{_e(job.get('software'))}.</p>",
        f"<nav>{nav}</nav>",
        _cautions(document.get("cautions", [])),
    ]
    for anchor, title in present:
        parts.append(f'<section id="{anchor}"><h2>{_e(title)}</h2>')
        parts += sections[anchor]
        parts.append("</section>")
    body = "\n".join(p for p in parts if p)
    return (
        "<!DOCTYPE html>\n<html lang='en'><head><meta charset='utf-8'>"
        f"<title>DEM audit {_e(job['name'])}</title><style>{_STYLE}</style></head>"
        f"<body>\n{body}\n</body></html>\n"
    )


class _Figures:
    """The document's figures as <figure> elements, each placed once."""

    def __init__(self, document: Mapping[str, Any], images: Mapping[str, bytes]) -> None:
        meta = document.get("figures") or {}
        self._meta = meta if isinstance(meta, Mapping) else {}
        self._names = [n for n in figure_names(document) if n in images]
        self._images = images
        self._placed: set[str] = set()

    def of(self, section: str) -> list[str]:
        names = [n for n in self._names if FIGURE_SECTIONS.get(n) == section]
        return [self._element(n) for n in names]

    def rest(self) -> list[str]:
        return [self._element(n) for n in self._names if n not in FIGURE_SECTIONS]

    def _element(self, name: str) -> str:
        self._placed.add(name)
        data = base64.b64encode(self._images[name]).decode("ascii")
        meta = self._meta.get(name) or {}
        caption = _e(meta.get("shows") or name)
        if meta.get("colour_limits_m"):
            low, high = meta["colour_limits_m"]
            caption += (
                f". Colour limits {_number(float(low))} to {_number(float(high))} m "
                f"({_e(meta.get('limit_rule'))})"
            )
        return (
            f'<figure><img src="data:image/png;base64,{data}" alt="{_e(name)}" '
            f'data-name="{_e(name)}"><figcaption>{caption}</figcaption></figure>'
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


def _grading_table(grades: Sequence[Mapping[str, Any]]) -> str:
    """One row per standard: its verdict or sentence, the checks, best class met, warnings."""
    rows = []
    for grade in grades:
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
    return (
        "<table><tr><th>standard</th><th>grade</th><th>checks</th><th>best class met</th>"
        f"<th>warnings</th></tr>{''.join(rows)}</table>"
    )


def _checkpoints(cp: Mapping[str, Any]) -> list[str]:
    counts = cp["counts"]
    assumptions = "".join(f"<li>{_e(a)}</li>" for a in cp.get("cautions", []))
    by_region = cp.get("by_region") or {}
    return [
        f"<p>Cover groups of the checkpoints:</p><ul>{assumptions}</ul>" if assumptions else "",
        f"<p>{counts['used']} of {counts['read']} checkpoints used, {counts['rejected']} "
        f"rejected (reasons in {_e(cp.get('residuals_file'))}).</p>",
        _stats_table(
            [("checkpoints", cp["stats"])]
            + [(k, v) for k, v in cp.get("by_cover_group", {}).items()]
            + [(f"region {k}", v) for k, v in by_region.items()]
        ),
        _grading_table(cp.get("grading", [])),
    ]


def _indicative(grades: Sequence[Mapping[str, Any]]) -> list[str]:
    if not grades:
        return []
    note = next((g.get("note") for g in grades if g.get("note")), "")
    return [f"<h3>Indicative grades</h3><p>{_e(note)}</p>", _grading_table(grades)]


def _coregistration(c: Mapping[str, Any]) -> list[str]:
    if c.get("status") != "ok":
        return [f"<p>Not estimated: {_e(c.get('reason'))}</p>"]
    outliers = ", ".join(c.get("outlier_tiles", {}) or []) or "none"
    parts = [
        f"<p>{_e(c.get('method'))}: shift east {_number(c['east_m'])} m, north "
        f"{_number(c['north_m'])} m, vertical {_number(c['vertical_m'])} m. "
        f"Outlier tiles: {_e(outliers)}.</p>",
    ]
    after = c.get("after") or {}
    if after.get("overall"):
        parts.append("<p>After applying the shift:</p>")
        parts.append(
            _stats_table(
                [("(all)", after["overall"]["stats"])]
                + [(r["region"], r["stats"]) for r in after.get("regions", [])]
            )
        )
    return parts


def _tile_problems(tiles: Sequence[Mapping[str, Any]]) -> list[str]:
    bad = [t for t in tiles if t.get("status") not in ("ok", "not_audited")]
    if not bad:
        return [f"<p>All {len(tiles)} tiles audited.</p>"] if tiles else []
    rows = "".join(
        f"<tr><td>{_e(t['tile'])}</td><td>{_e(t['status'])}</td><td>{_e(t.get('reason'))}</td></tr>"
        for t in bad
    )
    return [
        "<h3>Tiles not audited</h3>",
        f"<table><tr><th>tile</th><th>status</th><th>reason</th></tr>{rows}</table>",
    ]


def _interval(ci: object) -> str:
    if not isinstance(ci, Sequence) or len(ci) != 2:
        return "–"
    return f"[{_number(ci[0])}, {_number(ci[1])}]"


def _overall(document: Mapping[str, Any]) -> list[str]:
    detail = document.get("overall_detail") or {}
    parts = [_stats_table([("(all)", document["overall"])])]
    ci = detail.get("confidence_95") or {}
    if ci:
        parts.append(
            f"<p>95 % intervals: median {_interval(ci.get('median'))} m, |dh| 68.3 % quantile "
            f"{_interval(ci.get('q683_abs'))} m, |dh| 95 % quantile {_interval(ci.get('q95_abs'))}"
            f" m; {_e(ci.get('assumes'))}.</p>"
        )
    trimmed = detail.get("without_outliers") or {}
    if trimmed.get("stats"):
        parts.append(
            f"<p>Without outliers ({_e(trimmed.get('rule'))}): {_number(trimmed.get('removed'))} "
            "pixels removed.</p>"
        )
        parts.append(_stats_table([("without outliers", trimmed["stats"])]))
    if document.get("excluded_pixels") or (document["overall"] or {}).get("excluded_pixels"):
        parts.append(
            f"<p>Pixels excluded: {_number(document['overall'].get('excluded_pixels'))}.</p>"
        )
    return parts


def _regions(regions: Sequence[Mapping[str, Any]]) -> list[str]:
    if not regions:
        return []
    rows = "".join(
        f"<tr><td>{_e(r['region'])} {_e(r.get('name', ''))}</td>"
        f"<td>{_interval((r.get('confidence_95') or {}).get('median'))}</td>"
        f"<td>{_number((r.get('without_outliers') or {}).get('removed'))}</td>"
        f"<td>{_e(r.get('note', ''))}</td></tr>"
        for r in regions
    )
    return [
        _stats_table([(f"{r['region']} {r.get('name', '')}", r["stats"]) for r in regions]),
        "<table><tr><th>region</th><th>median 95 % interval (m)</th><th>outliers removed</th>"
        f"<th>note</th></tr>{rows}</table>",
    ]


def _strata(document: Mapping[str, Any]) -> list[str]:
    strata = (document.get("overall_detail") or {}).get("strata") or []
    if not strata:
        return []
    return [_stats_table([(s["stratum"], s["stats"]) for s in strata])]


def _derivatives(d: Mapping[str, Any]) -> list[str]:
    """Whole-job test - reference of each derived parameter, and the D8 agreement."""
    rows = [(f"{k} ({u})", d[k]["overall"]["stats"]) for k, u in d.get("units", {}).items()]
    share = (d.get("d8_agreement") or {}).get("overall", {}).get("share")
    d8 = [] if share is None else [f"<p>D8 flow directions agree at {100 * share:.1f} %.</p>"]
    return ([_stats_table(rows)] if rows else []) + d8


def _recheck(r: Mapping[str, Any]) -> list[str]:
    regressions = int(r.get("regressions") or 0)
    summary = (
        f"<p>Compared with the run finished {_e(r.get('baseline_finished'))} "
        f"({_e(r.get('baseline'))}): {len(r.get('tiles_recomputed', []))} tiles recomputed, "
        f"{_number(r.get('tiles_reused'))} reused, {len(r.get('tiles_added', []))} added, "
        f"{len(r.get('tiles_removed', []))} removed. "
        f'<span class="{"regressed" if regressions else "improved"}">{regressions} '
        f"regression{'s' if regressions != 1 else ''}</span>.</p>"
    )
    limits = r.get("thresholds") or {}
    rule = (
        "<p>A tile or region regresses when its NMAD grows by more than "
        f"{_number(limits.get('nmad_worse_fraction'))} of itself or "
        f"{_number(limits.get('nmad_worse_m'))} m, or its median moves more than "
        f"{_number(limits.get('median_moved_m'))} m away from zero.</p>"
        if limits
        else ""
    )
    order = {"regressed": 0, "improved": 1, "new": 2, "removed": 3, "unchanged": 4}
    tiles = sorted(r.get("tiles", []), key=lambda t: (order.get(t["verdict"], 9), t["tile"]))
    lost = "".join(
        f"<li class='regressed'>{_e(g['standard'])}: {_e(g['flag'])}</li>"
        for g in r.get("grades_lost", [])
    )
    return [
        summary,
        rule,
        _change_table("region", r.get("regions", []), "region"),
        _change_table("tile", tiles, "tile", why=True),
        f"<p>Grades lost:</p><ul>{lost}</ul>" if lost else "<p>No grade lost.</p>",
    ]


def _change_table(
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
        lines.append(
            f"<tr><td>{_e(row[key])}</td><td class='{_e(row['verdict'])}'>{_e(row['verdict'])}</td>"
            f"<td>{_number(before.get('median'))}</td><td>{_number(after.get('median'))}</td>"
            f"<td>{_number(before.get('nmad'))}</td><td>{_number(after.get('nmad'))}</td>"
            f"<td>{_e('; '.join(row.get('flags') or []))}</td>"
            + (f"<td>{_e(row.get('why'))}</td>" if why else "")
            + "</tr>"
        )
    return f"<table>{head}{''.join(lines)}</table>"


def _sources(document: Mapping[str, Any]) -> list[str]:
    sources = document.get("sources") or {}
    transforms = sources.get("vertical_transformations") or []
    rows = "".join(
        f"<tr><td>{_e(t.get('role'))}</td><td>{_e(t.get('from'))} → {_e(t.get('to'))}</td>"
        f"<td>{_e('; '.join(str(o) for o in t.get('operations') or []))}</td>"
        f"<td>{_number(t.get('accuracy_m'))}</td></tr>"
        for t in transforms
    )
    files = {k: v for k, v in sources.items() if k != "vertical_transformations"}
    listing = "".join(
        f"<tr><td>{_e(k)}</td><td><code>{_e(v)}</code></td></tr>" for k, v in sorted(files.items())
    )
    job = document.get("job") or {}
    parts = [
        f"<p>Software: {_e(job.get('software'))}. Tiles: "
        f"{_e((job.get('tiles') or {}).get('test'))} test, "
        f"{_e((job.get('tiles') or {}).get('reference'))} reference.</p>"
    ]
    if rows:
        parts.append(
            "<table><tr><th>heights</th><th>conversion</th><th>operations</th>"
            f"<th>stated accuracy (m)</th></tr>{rows}</table>"
        )
    if listing:
        parts.append(
            f"<details><summary>{len(files)} input files and their fingerprints</summary>"
            f"<table><tr><th>file</th><th>SHA-256</th></tr>{listing}</table></details>"
        )
    failures = document.get("reference_failures") or []
    if failures:
        parts.append(
            "<p>Reference tiles that could not be read:</p><ul>"
            + "".join(f"<li>{_e(f)}</li>" for f in failures)
            + "</ul>"
        )
    return parts
