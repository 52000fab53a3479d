"""The output folder as a whole: checked before a run, built beside its target and swapped in
only when complete (so a failed run leaves an earlier result as it was); the JSON documents
written into it, and files linked into it from an earlier result. Names: workers/outputs/layout.py.
"""

from __future__ import annotations

import json
import math
import os
import shutil
import uuid
from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import numpy as np

from demaudit.workers.errors import AuditError, OutputError
from demaudit.workers.outputs.layout import (
    RESULT_MARKERS,
    SUMMARY_NAME,
    partial_folder,
    replaced_folder,
)


def check_output_folder(target: Path) -> Path:
    """The absolute output folder; OutputError when it is a file, or a non-empty folder that
    holds no earlier result (its files would be replaced)."""
    target = Path(target).expanduser().resolve()
    if target.exists() and not target.is_dir():
        raise OutputError(f"--out: {target} is a file, not a folder")
    if target.is_dir():
        try:
            entries = sorted(p.name for p in target.iterdir())
        except OSError as exc:
            raise OutputError(f"--out: cannot read the folder {target}: {exc.strerror}") from None
        if entries and not any(name in entries for name in RESULT_MARKERS):
            shown = ", ".join(entries[:3]) + (", ..." if len(entries) > 3 else "")
            raise OutputError(
                f"--out: {target} holds files that are not demaudit results ({shown}); a run "
                "replaces its output folder as a whole, so name a new or empty folder"
            )
    return target


@contextmanager
def staged_folder(target: Path, run_id: str) -> Iterator[Path]:
    """Yield a new folder ``<target>.partial-<run_id>`` beside target to build a result in; when
    the block ends without error, swap it in place of target (an earlier result there is
    replaced as a whole), else remove it. The target appears complete or not at all.

    Errors of the file system (read-only, disk full, a file in the way) become OutputError with
    one line naming the file; target is then left as it was.
    """
    target = check_output_folder(target)
    partial = partial_folder(target, run_id)
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
        partial.mkdir()
    except OSError as exc:
        raise OutputError(
            f"--out: cannot create {_failed_path(exc, partial)} (results are built beside the "
            f"output folder, then swapped in): {exc.strerror or exc}"
        ) from None
    try:
        yield partial
        _swap_in(partial, target, run_id)
    except OSError as exc:
        shutil.rmtree(partial, ignore_errors=True)
        if isinstance(exc, AuditError):
            raise
        raise OutputError(
            f"the run stopped on a file error and left {target} as it was: "
            f"{exc.strerror or exc}: {_failed_path(exc, partial)}"
        ) from None
    except BaseException:
        shutil.rmtree(partial, ignore_errors=True)
        raise


def _swap_in(partial: Path, target: Path, run_id: str) -> None:
    """Put partial in place of target: the old folder aside, the new one in, the old removed
    (moved back when the new one cannot go in)."""
    aside = replaced_folder(target, run_id)
    had = target.exists()
    if had:
        target.rename(aside)
    try:
        partial.rename(target)
    except OSError:
        if had:
            aside.rename(target)
        raise
    if had:
        shutil.rmtree(aside, ignore_errors=True)


def _failed_path(exc: OSError, fallback: Path) -> str:
    return str(exc.filename) if exc.filename else str(fallback)


def link_or_copy(source: str, target: str) -> None:
    """Hard-link a file where the file system allows, else copy it. Safe for zarr stores: zarr
    writes a new file and renames it over the old, never rewriting a file in place."""
    Path(target).unlink(missing_ok=True)  # never write through a link into the other store
    try:
        os.link(source, target)
    except OSError:  # another file system, or links not allowed
        shutil.copy2(source, target)


def write_by_rename(path: Path, data: bytes) -> None:
    """Write a file whole or not at all: a new temporary file beside it (a unique name, made
    exclusively: never a leftover that a link may share with an earlier result), renamed over
    it; removed again when writing fails. Nothing is written in place, so a file linked from an
    earlier result stays as it was."""
    temporary = path.with_name(f".{path.name}.{uuid.uuid4().hex}.partial")
    try:
        with open(temporary, "xb") as fh:
            fh.write(data)
        os.replace(temporary, path)
    except BaseException:
        temporary.unlink(missing_ok=True)
        raise


def write_summary(out_dir: Path, document: Mapping[str, Any], *, name: str = SUMMARY_NAME) -> Path:
    """Write a JSON document (summary.json by default; NaN and infinities as null)."""
    path = Path(out_dir) / name
    path.write_text(json.dumps(_json_safe(document), indent=2) + "\n", encoding="utf-8")
    return path


def _json_safe(value: Any) -> Any:
    if isinstance(value, Mapping):
        return {str(k): _json_safe(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_json_safe(v) for v in value]
    if isinstance(value, float | np.floating):
        return float(value) if math.isfinite(value) else None
    if isinstance(value, np.integer):
        return int(value)
    return value
