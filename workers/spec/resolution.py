"""Resolve a validated spec against the file system: every path made absolute, every tile glob
and folder expanded (counted against MAX_FILES_PER_FIELD as listed), every file checked to exist
and, with data roots, to lie inside them. Paths in messages are shown relative to their data
root (workers/inputs/confine.py: shown); without data roots as resolved.
"""

from __future__ import annotations

import fnmatch
import glob
import os
from collections.abc import Callable, Iterable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path

from demaudit.workers.errors import DataRootError, SpecError
from demaudit.workers.inputs.confine import Roots, real_roots, shown
from demaudit.workers.spec.job import JobSpec
from demaudit.workers.spec.paths import MAX_FILES_PER_FIELD, MAX_PATH_CHARS


@dataclass(frozen=True)
class ResolvedJob:
    """A validated spec with every path made absolute and every tile glob expanded.

    ``data_roots`` (resolved) confine every read of the job's files (workers/inputs/confine.py);
    None when the job was resolved without roots. ``base_dir``: the folder relative spec paths
    were resolved against (resolved)."""

    spec: JobSpec
    test_tiles: tuple[Path, ...]
    reference_tiles: tuple[Path, ...]
    region_file: Path | None
    landcover_tiles: tuple[Path, ...] = ()
    checkpoint_file: Path | None = None
    data_roots: Roots = None
    base_dir: Path | None = None

    @property
    def anchors(self) -> tuple[str, ...]:
        """The folders catalog.json names tiles relative to: the data roots, else the (resolved)
        folder relative spec paths were resolved against (workers/inputs/catalog_file.py)."""
        if self.data_roots:
            return self.data_roots
        return (str((self.base_dir or Path.cwd()).resolve()),)

    def shown(self, path: str | Path | None) -> str:
        """path as messages and summary.json show it (relative to its data root)."""
        return "(none)" if path is None else shown(path, self.data_roots)


def resolve(
    spec: JobSpec, *, base_dir: Path, data_roots: Sequence[Path] | None = None
) -> ResolvedJob:
    """Make paths absolute against base_dir, expand tile globs and check the files exist.

    When data_roots is given, every path must lie inside one of them (DataRootError otherwise),
    and the job's reads stay confined to them (ResolvedJob.data_roots). Problems name the field;
    paths in messages are relative to their data root.
    """
    roots = real_roots(data_roots)
    test = _expand_tiles(spec.test.tiles, base_dir=base_dir, field="test.tiles", roots=roots)
    ref: tuple[Path, ...] = ()
    if spec.reference is not None:
        ref = _expand_tiles(
            spec.reference.tiles, base_dir=base_dir, field="reference.tiles", roots=roots
        )
    checkpoint_file = None
    if spec.checkpoints is not None:
        checkpoint_file = _resolve_file(spec.checkpoints.file, base_dir, "checkpoints.file", roots)
    region_file = None
    if spec.region is not None:
        region_file = _resolve_file(spec.region.file, base_dir, "region.file", roots)
    landcover: tuple[Path, ...] = ()
    if spec.landcover is not None:
        landcover = _expand_tiles(
            spec.landcover.tiles, base_dir=base_dir, field="landcover.tiles", roots=roots
        )
    return ResolvedJob(
        spec, test, ref, region_file, landcover, checkpoint_file, roots, Path(base_dir).resolve()
    )


def resolve_in_roots(spec: JobSpec, *, data_roots: Sequence[Path] | None) -> ResolvedJob:
    """Resolve a spec that arrived without a file (over HTTP, from a schedule): relative paths
    against the first data root (the working folder when there are none), every file inside
    the roots, symlinks included."""
    base_dir = Path(data_roots[0]) if data_roots else Path.cwd()
    return resolve(spec, base_dir=base_dir, data_roots=data_roots)


def _resolve_path(raw: str, base_dir: Path, field: str, roots: Roots) -> Path:
    """raw made absolute and resolved; SpecError naming the field for a path that cannot be a
    path (NUL, too long, an unknown ~user), DataRootError when it lies outside the roots."""
    if "\0" in raw or len(raw) > MAX_PATH_CHARS:
        raise SpecError(f"{field}: not a usable path (NUL byte, or over {MAX_PATH_CHARS} chars)")
    try:
        path = Path(raw).expanduser()
    except RuntimeError:  # pathlib: no home folder for that user
        user = raw[1:].split("/", 1)[0]
        raise SpecError(f"{field}: cannot expand '~{user}': no such user") from None
    if not path.is_absolute():
        path = base_dir / path
    try:
        path = path.resolve()
    except (OSError, ValueError) as exc:
        why = getattr(exc, "strerror", None) or str(exc)
        raise SpecError(f"{field}: {raw!r} cannot be resolved: {why}") from None
    if roots is not None and not any(path.is_relative_to(r) for r in roots):
        raise DataRootError(f"{field}: {raw!r} lies outside the allowed data roots")
    return path


def _resolve_file(raw: str, base_dir: Path, field: str, roots: Roots) -> Path:
    path = _resolve_path(raw, base_dir, field, roots)
    if not _is(path.is_file):
        raise SpecError(f"{field}: no such file {shown(path, roots)}")
    return path


def _is(check: Callable[[], bool]) -> bool:
    """path.is_file() and the like, False where the OS cannot say (e.g. a name too long)."""
    try:
        return check()
    except (OSError, ValueError):
        return False


def _expand_tiles(
    tiles: str | list[str], *, base_dir: Path, field: str, roots: Roots
) -> tuple[Path, ...]:
    patterns = [tiles] if isinstance(tiles, str) else list(tiles)
    found: list[Path] = []
    budget = [MAX_FILES_PER_FIELD]
    listings: dict[Path, list[str]] = {}  # a folder many patterns look into is listed once
    for pattern in patterns:
        path = _resolve_path(pattern, base_dir, field, roots)
        if _is(path.is_dir):
            matches = sorted(_listed(_folder_tiles(path), budget, field))
        elif glob.has_magic(str(path)):
            matches = sorted(_listed(_globbed(path, listings), budget, field))
        elif _is(path.is_file):
            matches = [path]
        else:
            raise SpecError(f"{field}: no such file or folder {shown(path, roots)}")
        if not matches:
            raise SpecError(
                f"{field}: {pattern!r} matches no tiles (looked in {shown(path, roots)})"
            )
        for match in matches:  # a match may be a symlink leading out of the roots
            real = match.resolve()
            if roots is not None and not any(real.is_relative_to(r) for r in roots):
                raise DataRootError(
                    f"{field}: {shown(match, roots)} leads outside the allowed data roots"
                )
        found.extend(matches)
    unique = tuple(dict.fromkeys(found))
    return unique


def _globbed(pattern: Path, listings: dict[Path, list[str]]) -> Iterator[Path]:
    """What glob.glob gives for pattern; with magic in the file name only, from one listing of
    its folder per resolve (names starting with '.' only for a pattern starting with '.')."""
    folder, name = pattern.parent, pattern.name
    if glob.has_magic(str(folder)):
        yield from map(Path, glob.iglob(str(pattern)))
        return
    if folder not in listings:
        try:
            listings[folder] = sorted(os.listdir(folder))
        except OSError:
            listings[folder] = []
    hidden = name.startswith(".")
    for entry in fnmatch.filter(listings[folder], name):
        if hidden or not entry.startswith("."):
            yield folder / entry


def _folder_tiles(folder: Path) -> Iterator[Path]:
    return (p for p in folder.iterdir() if p.suffix.lower() in {".tif", ".tiff"})


def _listed(paths: Iterable[Path], budget: list[int], field: str) -> Iterator[Path]:
    """paths, counted against the field's budget of files (SpecError once it is spent)."""
    for path in paths:
        budget[0] -= 1
        if budget[0] < 0:
            raise SpecError(
                f"{field}: the patterns and folders list more than {MAX_FILES_PER_FIELD:,} "
                "files; split the job"
            )
        yield path
