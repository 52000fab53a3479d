"""A self-contained HTML page of a job's results, for people: written next to summary.json.

Plain HTML and CSS, no script, nothing fetched: the figures are embedded as data URIs, so the
page alone can be mailed, archived or printed (a print stylesheet keeps figures and tables whole
on their pages). :func:`render` is pure (the document and the figures' bytes in, a string out);
:func:`write_report` reads the figure files the document lists.
"""

from __future__ import annotations

import base64
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from demaudit.workers.outputs import report_sections as sec
from demaudit.workers.outputs.layout import REPORT_NAME
from demaudit.workers.outputs.report_format import cautions_box, esc, number
from demaudit.workers.uncertainty.report import uncertainty_section

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
    "tile_q95_abs.png": "tiles",
    "tile_rmse.png": "tiles",
    "dh_by_stratum.png": "strata",
    "tile_shifts.png": "coregistration",
    "recheck_tiles.png": "recheck",
    "recheck_regions.png": "recheck",
    "error_model.png": "uncertainty",
}


def render(document: Mapping[str, Any], *, images: Mapping[str, bytes] | None = None) -> str:
    """The page as a string; figures whose bytes are given are embedded, others left out."""
    job = document["job"]
    sections = section_parts(document, _Figures(document, images or {}))
    present = [(anchor, title) for anchor, title in SECTIONS if sections[anchor]]
    nav = " ".join(f'<a href="#{a}">{esc(t)}</a>' for a, t in present)
    parts = [
        f"<h1>DEM audit: {esc(job['name'])}</h1>",
        f"<p>dh = {esc(document['sign'])}, in {esc(document['units'])}s. "
        f"Started {esc(job.get('started'))}, finished {esc(job.get('finished'))}, "
        f"{esc(job.get('software'))}.</p>",
        f"<nav>{nav}</nav>",
        cautions_box(document.get("cautions", [])),
    ]
    for anchor, title in present:
        parts.append(f'<section id="{anchor}"><h2>{esc(title)}</h2>')
        parts += sections[anchor]
        parts.append("</section>")
    body = "\n".join(p for p in parts if p)
    return (
        "<!DOCTYPE html>\n<html lang='en'><head><meta charset='utf-8'>"
        f"<title>DEM audit {esc(job['name'])}</title><style>{_STYLE}</style></head>"
        f"<body>\n{body}\n</body></html>\n"
    )


def section_parts(document: Mapping[str, Any], figures: _Figures) -> dict[str, list[str]]:
    """Each section's HTML fragments (empty: the section is left out), figures placed."""
    d = document
    return {
        "overall": sec.overall(d)
        + figures.of("overall")
        + sec.indicative(d.get("grading_indicative") or []),
        "regions": sec.regions(d.get("regions") or []),
        "tiles": figures.of("tiles") + sec.tile_problems(d.get("tiles", [])),
        "strata": sec.strata(d) + figures.of("strata"),
        "checkpoints": sec.checkpoints(d["checkpoints"]) if d.get("checkpoints") else [],
        "coregistration": (
            sec.coregistration(d["coregistration"]) if d.get("coregistration") else []
        )
        + figures.of("coregistration"),
        "derivatives": sec.derivatives(d.get("derivatives") or {}),
        "uncertainty": uncertainty_section(d) + figures.of("uncertainty"),
        "recheck": sec.recheck(d["recheck"]) + figures.of("recheck") if d.get("recheck") else [],
        "other-figures": figures.rest(),
        "sources": sec.sources(d),
    }


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
        caption = esc(meta.get("shows") or name)
        if meta.get("colour_limits_m"):
            low, high = meta["colour_limits_m"]
            caption += (
                f". Colour limits {number(float(low))} to {number(float(high))} m "
                f"({esc(meta.get('limit_rule'))})"
            )
        return (
            f'<figure><img src="data:image/png;base64,{data}" alt="{esc(name)}" '
            f'data-name="{esc(name)}"><figcaption>{caption}</figcaption></figure>'
        )
