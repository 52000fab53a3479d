"""The sections of report.html as lists of HTML fragments, one function per section of
summary.json (pure: the document's parts in, strings out). The page and its figures are put
together by :mod:`demaudit.workers.outputs.report_html`."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

from demaudit.workers.outputs.figures.compute import NMAD_INTERVAL_NOTE, nmad_interval
from demaudit.workers.outputs.report_format import (
    change_table,
    esc,
    grading_table,
    interval,
    number,
    stats_table,
)


def checkpoints(cp: Mapping[str, Any]) -> list[str]:
    counts = cp["counts"]
    assumptions = "".join(f"<li>{esc(a)}</li>" for a in cp.get("cautions", []))
    by_region = cp.get("by_region") or {}
    return [
        f"<p>Cover groups of the checkpoints:</p><ul>{assumptions}</ul>" if assumptions else "",
        f"<p>{counts['used']} of {counts['read']} checkpoints used, {counts['rejected']} "
        f"rejected (reasons in {esc(cp.get('residuals_file'))}).</p>",
        stats_table(
            [("checkpoints", cp["stats"])]
            + [(k, v) for k, v in cp.get("by_cover_group", {}).items()]
            + [(f"region {k}", v) for k, v in by_region.items()]
        ),
        grading_table(cp.get("grading", [])),
    ]


def indicative(grades: Sequence[Mapping[str, Any]]) -> list[str]:
    if not grades:
        return []
    note = next((g.get("note") for g in grades if g.get("note")), "")
    return [f"<h3>Indicative grades</h3><p>{esc(note)}</p>", grading_table(grades)]


def coregistration(c: Mapping[str, Any]) -> list[str]:
    if c.get("status") != "ok":
        return [f"<p>Not estimated: {esc(c.get('reason'))}</p>"]
    outliers = ", ".join(c.get("outlier_tiles", {}) or []) or "none"
    parts = [
        f"<p>{esc(c.get('method'))}: shift east {number(c['east_m'])} m, north "
        f"{number(c['north_m'])} m, vertical {number(c['vertical_m'])} m. "
        f"Outlier tiles: {esc(outliers)}.</p>",
    ]
    after = c.get("after") or {}
    if after.get("overall"):
        parts.append("<p>After applying the shift:</p>")
        parts.append(
            stats_table(
                [("(all)", after["overall"]["stats"])]
                + [(r["region"], r["stats"]) for r in after.get("regions", [])]
            )
        )
    return parts


def tile_problems(tiles: Sequence[Mapping[str, Any]]) -> list[str]:
    bad = [t for t in tiles if t.get("status") not in ("ok", "not_audited")]
    if not bad:
        return [f"<p>All {len(tiles)} tiles audited.</p>"] if tiles else []
    rows = "".join(
        f"<tr><td>{esc(t['tile'])}</td><td>{esc(t['status'])}</td><td>{esc(t.get('reason'))}</td></tr>"
        for t in bad
    )
    return [
        "<h3>Tiles not audited</h3>",
        f"<table><tr><th>tile</th><th>status</th><th>reason</th></tr>{rows}</table>",
    ]


def overall(document: Mapping[str, Any]) -> list[str]:
    detail = document.get("overall_detail") or {}
    parts = [stats_table([("(all)", document["overall"])])]
    ci = detail.get("confidence_95") or {}
    if ci:
        parts.append(
            f"<p>95 % intervals: median {interval(ci.get('median'))} m, |dh| 68.3 % quantile "
            f"{interval(ci.get('q683_abs'))} m, |dh| 95 % quantile {interval(ci.get('q95_abs'))}"
            f" m; {esc(ci.get('assumes'))}.</p>"
        )
    trimmed = detail.get("without_outliers") or {}
    if trimmed.get("stats"):
        parts.append(
            f"<p>Without outliers ({esc(trimmed.get('rule'))}): {number(trimmed.get('removed'))} "
            "pixels removed.</p>"
        )
        parts.append(stats_table([("without outliers", trimmed["stats"])]))
    if document.get("excluded_pixels") or (document["overall"] or {}).get("excluded_pixels"):
        parts.append(
            f"<p>Pixels excluded: {number(document['overall'].get('excluded_pixels'))}.</p>"
        )
    return parts


def regions(regions: Sequence[Mapping[str, Any]]) -> list[str]:
    if not regions:
        return []
    rows = "".join(
        f"<tr><td>{esc(r['region'])} {esc(r.get('name', ''))}</td>"
        f"<td>{interval((r.get('confidence_95') or {}).get('median'))}</td>"
        f"<td>{number((r.get('without_outliers') or {}).get('removed'))}</td>"
        f"<td>{esc(r.get('note', ''))}</td></tr>"
        for r in regions
    )
    return [
        stats_table([(f"{r['region']} {r.get('name', '')}", r["stats"]) for r in regions]),
        "<table><tr><th>region</th><th>median 95 % interval (m)</th><th>outliers removed</th>"
        f"<th>note</th></tr>{rows}</table>",
    ]


def strata(document: Mapping[str, Any]) -> list[str]:
    strata = (document.get("overall_detail") or {}).get("strata") or []
    if not strata:
        return []
    return [stats_table([(s["stratum"], s["stats"]) for s in strata]), nmad_intervals(strata)]


def nmad_intervals(entries: Sequence[Mapping[str, Any]]) -> str:
    """Each stratum's NMAD with its 95 % interval (figures.compute.nmad_interval)."""
    rows = []
    for entry in entries:
        stats = entry.get("stats") or {}
        if not stats.get("count") or stats.get("nmad") is None:
            continue
        ci = nmad_interval(float(stats["nmad"]), int(stats["count"]))
        rows.append(
            f"<tr><td>{esc(entry['stratum'])}</td><td>{number(float(stats['nmad']))}</td>"
            f"<td>{interval(list(ci) if ci else None)}</td></tr>"
        )
    return (
        "<table><tr><th>stratum</th><th>NMAD (m)</th><th>NMAD 95 % interval (m)</th></tr>"
        f"{''.join(rows)}</table><p>{esc(NMAD_INTERVAL_NOTE)}</p>"
    )


def derivatives(d: Mapping[str, Any]) -> list[str]:
    """Whole-job test - reference of each derived parameter, and the D8 agreement."""
    rows = [(f"{k} ({u})", d[k]["overall"]["stats"]) for k, u in d.get("units", {}).items()]
    share = (d.get("d8_agreement") or {}).get("overall", {}).get("share")
    d8 = [] if share is None else [f"<p>D8 flow directions agree at {100 * share:.1f} %.</p>"]
    return ([stats_table(rows)] if rows else []) + d8


def recheck(r: Mapping[str, Any]) -> list[str]:
    regressions = int(r.get("regressions") or 0)
    summary = (
        f"<p>Compared with the run finished {esc(r.get('baseline_finished'))} "
        f"({esc(r.get('baseline'))}): {len(r.get('tiles_recomputed', []))} tiles recomputed, "
        f"{number(r.get('tiles_reused'))} reused, {len(r.get('tiles_added', []))} added, "
        f"{len(r.get('tiles_removed', []))} removed. "
        f'<span class="{"regressed" if regressions else "improved"}">{regressions} '
        f"regression{'s' if regressions != 1 else ''}</span>.</p>"
    )
    limits = r.get("thresholds") or {}
    rule = (
        "<p>A tile or region regresses when its NMAD grows by more than "
        f"{number(limits.get('nmad_worse_fraction'))} of itself or "
        f"{number(limits.get('nmad_worse_m'))} m, or its median moves more than "
        f"{number(limits.get('median_moved_m'))} m away from zero.</p>"
        if limits
        else ""
    )
    order = {"regressed": 0, "improved": 1, "new": 2, "removed": 3, "unchanged": 4}
    tiles = sorted(r.get("tiles", []), key=lambda t: (order.get(t["verdict"], 9), t["tile"]))
    lost = "".join(
        f"<li class='regressed'>{esc(g['standard'])}: {esc(g['flag'])}</li>"
        for g in r.get("grades_lost", [])
    )
    return [
        summary,
        rule,
        change_table("region", r.get("regions", []), "region"),
        change_table("tile", tiles, "tile", why=True),
        f"<p>Grades lost:</p><ul>{lost}</ul>" if lost else "<p>No grade lost.</p>",
    ]


def sources(document: Mapping[str, Any]) -> list[str]:
    sources = document.get("sources") or {}
    transforms = sources.get("vertical_transformations") or []
    rows = "".join(
        f"<tr><td>{esc(t.get('role'))}</td><td>{esc(t.get('from'))} → {esc(t.get('to'))}</td>"
        f"<td>{esc('; '.join(str(o) for o in t.get('operations') or []))}</td>"
        f"<td>{number(t.get('accuracy_m'))}</td></tr>"
        for t in transforms
    )
    files = {k: v for k, v in sources.items() if k != "vertical_transformations"}
    listing = "".join(
        f"<tr><td>{esc(k)}</td><td><code>{esc(v)}</code></td></tr>"
        for k, v in sorted(files.items())
    )
    job = document.get("job") or {}
    parts = [
        f"<p>Software: {esc(job.get('software'))}. Tiles: "
        f"{esc((job.get('tiles') or {}).get('test'))} test, "
        f"{esc((job.get('tiles') or {}).get('reference'))} reference.</p>"
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
            + "".join(f"<li>{esc(f)}</li>" for f in failures)
            + "</ul>"
        )
    return parts
