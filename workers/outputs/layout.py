"""The result folder: one name for every file, folder and zarr group a job writes.

A job's result folder (``--out`` for the CLI, ``<results dir>/<job id>/`` for the service)::

    summary.json               the job document (written last)
    report.html                the report page, figures embedded
    catalog.json               every tile scanned (a re-check reads it, not the unchanged files)
    change_report.json         a re-check's verdicts against its baseline
    checkpoint_residuals.csv   one row per checkpoint
    *.png                      the figures, at the top of the folder (file names: the
                               ``BUILDERS`` of workers/outputs/figures)
    results.zarr/              Zarr format 3, consolidated metadata at the root except for the
                               summaries (open those with use_consolidated=False)
      tiles/                   dim tile: one variable per statistic; bounds, status, reason
      regions/                 dim region: one variable per statistic; name
      strata/                  dims area, stratum: one variable per statistic
      after_coregistration/    dim region (when co-registration was applied)
      dh_overview/dh           block mean of dh (1:factor), CF grid_mapping ``spatial_ref``
      tile_summaries/<tile>/   each tile's mergeable summaries (workers/outputs/summary_store.py)
      job_summaries/<part>/    the job totals: part ``all``, or ``after`` co-registration
      error_samples/<tile>/<part>/  error-model samples per tile (workers/uncertainty)
      standardised_dh_overview/     dh over its modelled sigma, on the overview grid
      derivatives_overview/    derived-parameter differences on the overview grid

While a run builds it, the folder is ``<folder>.partial-<run id>`` beside its target (and the
store inside it ``results.zarr.partial``); an earlier result is moved to
``<folder>.replaced-<run id>`` while the new one is swapped in (workers/outputs/writers.py:
staged_folder). The service keeps each job's execute request in
``<results dir>/.execution/<job id>.json``.
"""

from __future__ import annotations

from pathlib import Path

SUMMARY_NAME = "summary.json"
REPORT_NAME = "report.html"
CATALOG_NAME = "catalog.json"
CHANGE_REPORT_NAME = "change_report.json"
RESIDUALS_NAME = "checkpoint_residuals.csv"
ZARR_NAME = "results.zarr"

#: Tables of results.zarr, one group each.
TILES_GROUP = "tiles"
REGIONS_GROUP = "regions"
STRATA_GROUP = "strata"
AFTER_COREGISTRATION_GROUP = "after_coregistration"
#: The georeferenced dh overview: group and array.
OVERVIEW_GROUP = "dh_overview"
OVERVIEW_ARRAY = "dh"
#: Mergeable summaries: one group per tile, and the job totals in parts.
TILE_SUMMARIES_GROUP = "tile_summaries"
JOB_SUMMARIES_GROUP = "job_summaries"
ALL_PART, AFTER_PART = "all", "after"  # job totals: all results / after co-registration
#: Opt-in sections: error-model samples per tile, and two more overviews.
ERROR_SAMPLES_GROUP = "error_samples"
STANDARDISED_OVERVIEW_GROUP = "standardised_dh_overview"
DERIVATIVES_OVERVIEW_GROUP = "derivatives_overview"
#: Groups read with the zarr API, left out of the root's consolidated metadata.
UNCONSOLIDATED_GROUPS = frozenset({TILE_SUMMARIES_GROUP, JOB_SUMMARIES_GROUP, ERROR_SAMPLES_GROUP})

#: A folder holding one of these is taken for an earlier result, replaced as a whole by a new run.
RESULT_MARKERS = (SUMMARY_NAME, ZARR_NAME)
#: Folder of the service's execute requests, in the results folder beside the jobs' folders.
EXECUTION_FOLDER = ".execution"

_PARTIAL = ".partial"
_REPLACED = ".replaced"
#: What separates a partial folder's target name from its run id.
PARTIAL_SEPARATOR = f"{_PARTIAL}-"


def partial_folder(target: Path, run_id: str) -> Path:
    """The folder beside target that a run builds its result in."""
    return target.with_name(f"{target.name}{_PARTIAL}-{run_id}")


def replaced_folder(target: Path, run_id: str) -> Path:
    """Where an earlier result goes while a run swaps its new one in."""
    return target.with_name(f"{target.name}{_REPLACED}-{run_id}")


def leftover_patterns(name: str) -> tuple[str, str]:
    """Glob patterns of what runs of the folder name may leave beside it (partial, replaced)."""
    return f"{name}{_PARTIAL}-*", f"{name}{_REPLACED}-*"


def partial_store(store: Path) -> Path:
    """The path a results.zarr is built under before it replaces store."""
    return store.with_name(store.name + _PARTIAL)


def is_result(folder: Path) -> bool:
    """Whether folder holds a complete result: its summary.json and results.zarr."""
    return (folder / SUMMARY_NAME).is_file() and (folder / ZARR_NAME).is_dir()


def execution_record(results_dir: Path, job_id: str) -> Path:
    """The file keeping what job_id's execute request asked of its results."""
    return Path(results_dir) / EXECUTION_FOLDER / f"{job_id}.json"
