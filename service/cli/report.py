"""What ``demaudit run`` prints when a job is done: the region table, checkpoints and grades,
failed tiles, the re-check verdicts and the cautions worth a look."""

from __future__ import annotations

from pathlib import Path
from typing import Any

from demaudit.workers.outputs.layout import REPORT_NAME, SUMMARY_NAME, ZARR_NAME
from demaudit.workers.outputs.summary_document import CAUTIONS_ALWAYS

__all__ = ["print_report"]


def print_report(document: dict[str, Any], out_dir: Path) -> None:
    """Print the summary document of a finished run written to out_dir."""
    folder = Path(out_dir).resolve()
    print(f"\nresults: {folder / REPORT_NAME} (for people), {SUMMARY_NAME}, {ZARR_NAME}")
    print(f"dh = {document['sign']}, {document['units']}s\n")
    _print_regions(document)
    if document.get("checkpoints"):
        _print_checkpoints(document["checkpoints"])
    for t in document["tiles"]:
        if t["status"] == "failed":
            print(f"tile {t['tile']} failed: {t.get('reason')}")
    if document.get("recheck"):
        _print_recheck(document["recheck"])
    notable = [c for c in document["cautions"] if c not in CAUTIONS_ALWAYS]
    if notable:
        print("\ncautions:")
        for caution in notable:
            print(f"  ! {caution}")
    print(f"\nreport: {folder / REPORT_NAME}")
    print(document["cautions"][0])


def _print_regions(document: dict[str, Any]) -> None:
    header = (
        f"{'region':<26}{'pixels':>12}{'median':>9}{'nmad':>9}{'q683_abs':>10}"
        f"{'q95_abs':>9}{'rmse':>9}"
    )
    print(header)
    rows = [(f"{r['region']} {r.get('name', '')}", r["stats"]) for r in document["regions"]]
    rows.append(("(all)", document["overall"]))
    by_stratum = {s["stratum"]: s["stats"] for s in document["overall_detail"]["strata"]}
    if "cover_group:non_vegetated" in by_stratum:
        rows.append(("(all) non-vegetated", by_stratum["cover_group:non_vegetated"]))
    for name, s in rows:
        if not s["count"]:
            print(f"{name:<26}{0:>12}  no valid pixels")
            continue
        print(
            f"{name:<26}{s['count']:>12,}{s['median']:>9.3f}{s['nmad']:>9.3f}"
            f"{s['q683_abs']:>10.3f}{s['q95_abs']:>9.3f}{s['rmse']:>9.3f}"
        )


def _print_checkpoints(checkpoints: dict[str, Any]) -> None:
    counts, stats = checkpoints["counts"], checkpoints["stats"]
    print(
        f"\ncheckpoints: {counts['used']} of {counts['read']} used; median "
        f"{_metres(stats['median'])}, RMSE_z {_metres(stats['rmse'])}"
    )
    for grade in checkpoints["grading"]:
        verdict = {True: "met", False: "NOT met", None: "not decided"}[grade.get("met")]
        if "accuracy_z_95_m" in grade and "met" not in grade:
            verdict = f"Accuracy_z (95 %) {_metres(grade['accuracy_z_95_m'])}"
        if grade.get("scope") and grade.get("met") is not None:
            verdict += " (non-vegetated checks only)"
        label = f"{grade['standard']} {grade.get('class', '')}".strip()
        print(f"  {label}: {verdict}")


def _print_recheck(recheck: dict[str, Any]) -> None:
    print(
        f"\nre-check against {recheck['baseline']}: {len(recheck['tiles_recomputed'])} "
        f"tile(s) recomputed, {recheck['tiles_reused']} reused, "
        f"{recheck['regressions']} regression(s)"
    )
    for t in recheck["tiles"]:
        print(f"  {t['tile']:<20} {t['verdict']:<10} {t['why']}")


def _metres(value: float | None) -> str:
    return "–" if value is None else f"{value:.3f} m"
