"""Confined reading: a job reads only files inside the data roots, checked on the open file.

A spec's paths are checked when the job is accepted (workers/spec/resolution.py), but files
change after that: a tile or a region file swapped for a symlink leading out of the roots must not
be read. So every file a job reads (tiles, reference, land cover, regions, checkpoints) is opened
here, and the check is made on the file the kernel opened, not on a second lookup of its name::

    os.open(name, O_RDONLY | O_NONBLOCK)   a FIFO or a device never blocks the open
      ├─ fstat: a regular file only
      ├─ where it is: readlink /proc/self/fd/<n> (Linux: the kernel's path of this very open
      │  file); elsewhere realpath(name), which must have the open file's device and inode
      └─ inside a data root? no -> DataRootError naming the file relative to its root
    readers then use the same open file: read_bytes() and sha256() read the descriptor; GDAL
    opens /proc/self/fd/<n>, which is this open file again (no name lookup), with sidecar files
    (.aux.xml, .ovr, world files) switched off.

Where /proc is missing GDAL opens the checked real path: a swap between the check and GDAL's
open is then not caught (Linux, the platform the service is deployed on, has no such gap).

Without data roots (the CLI, ``--insecure-local`` without roots) nothing is confined, but files
are opened the same way (a regular file only, read from one descriptor).

Paths in messages and in summary.json: ``shown(path, roots)`` is the path relative to its data
root (never an absolute server path, a /proc path or a symlink target); without roots (CLI runs)
the path as the spec resolved it.
"""

from __future__ import annotations

import hashlib
import mmap
import os
import stat
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from demaudit.workers.errors import DataRootError, SpecError

__all__ = ["ConfinedFile", "Roots", "Stamp", "open_confined", "real_roots", "shown", "stamp_of"]

#: Data roots as resolved absolute paths (strings, so options stay small and picklable); None
#: means no confinement.
Roots = tuple[str, ...] | None

#: What says a file was not rewritten, without reading it: size, modification time (ns),
#: status-change time (ns) and inode. Anyone may set a file's mtime back (os.utime, ``touch -d``,
#: ``cp -p``), but not its ctime, which that very call sets to now; a copy renamed over the file
#: has a new inode. None (not recorded) never matches a stamp taken from a file.
Stamp = tuple[int, int, int | None, int | None]


def stamp_of(info: os.stat_result) -> Stamp:
    """The Stamp of a stat result."""
    return (info.st_size, info.st_mtime_ns, info.st_ctime_ns, info.st_ino)


_BLOCK = 1 << 20
_PROC_FD = "/proc/self/fd"
_OPEN_FLAGS = os.O_RDONLY | os.O_NONBLOCK | os.O_CLOEXEC | getattr(os, "O_NOCTTY", 0)


def real_roots(roots: Sequence[str | Path] | None) -> Roots:
    """The roots resolved (symlinks followed), as Roots; None or empty gives None."""
    if not roots:
        return None
    return tuple(str(Path(r).resolve()) for r in roots)


def shown(path: str | Path, roots: Roots) -> str:
    """How a path appears in messages: relative to the data root holding it (lexically), only
    its name when no root holds it; the path itself without roots."""
    if not roots:
        return str(path)
    absolute = Path(os.path.abspath(path))
    for root in roots:
        if absolute.is_relative_to(root):
            return absolute.relative_to(root).as_posix() or "."
    return absolute.name


class ConfinedFile:
    """An open regular file that was checked to lie inside the data roots.

    ``name`` is its path for messages (see shown); ``size``, ``mtime_ns`` and ``stamp`` are from
    fstat of the open file. Use as a context manager (closes the descriptor).
    """

    def __init__(self, fd: int, *, name: str, real: str, info: os.stat_result) -> None:
        self.fd = fd
        self.name = name
        self._real = real
        self.size = info.st_size
        self.mtime_ns = info.st_mtime_ns
        self.stamp = stamp_of(info)

    def __enter__(self) -> ConfinedFile:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        if self.fd >= 0:
            os.close(self.fd)
            self.fd = -1

    def read_bytes(self) -> bytes:
        """The whole content, read from the open descriptor."""
        return b"".join(self._blocks())

    def sha256(self) -> str:
        """SHA-256 (hex) of the content, read from the open descriptor: hashed straight from
        the page cache through a read-only mapping (no copy), or block by block where the file
        cannot be mapped (empty, or a file system without mappings)."""
        digest = hashlib.sha256()
        try:
            with mmap.mmap(self.fd, 0, access=mmap.ACCESS_READ) as mapped:
                digest.update(mapped)
        except (OSError, ValueError):  # ValueError: an empty file
            digest = hashlib.sha256()
            for block in self._blocks():
                digest.update(block)
        return digest.hexdigest()

    def _blocks(self) -> Iterator[bytes]:
        offset = 0
        while block := os.pread(self.fd, _BLOCK, offset):
            offset += len(block)
            yield block

    @property
    def gdal_path(self) -> str:
        """A name under which GDAL opens this same file (see the module docstring)."""
        proc = f"{_PROC_FD}/{self.fd}"
        return proc if os.path.isdir(_PROC_FD) else self._real

    def clean(self, message: str) -> str:
        """message with the names GDAL knows this file by replaced by ``name``."""
        for raw in (f"{_PROC_FD}/{self.fd}", self._real):
            message = message.replace(raw, self.name)
        return message

    @contextmanager
    def raster(self) -> Iterator[Any]:
        """The file opened by rasterio (read-only, no sidecar files looked for)."""
        import rasterio

        with (
            rasterio.Env(GDAL_DISABLE_READDIR_ON_OPEN="EMPTY_DIR"),
            rasterio.open(self.gdal_path) as dataset,
        ):
            yield dataset


def open_confined(path: str | Path, roots: Roots) -> ConfinedFile:
    """Open path for reading and check the open file against the roots (module docstring).

    Raises DataRootError ('<name> leads outside the allowed data roots') when the opened file
    lies outside every root, and OSError (errno and a message naming only ``shown(path)``, never
    a server path) when it cannot be opened or is not a regular file.
    """
    name = shown(path, roots)
    try:
        fd = os.open(path, _OPEN_FLAGS)
    except (OSError, ValueError) as exc:  # ValueError: a NUL byte in the name
        errno = getattr(exc, "errno", None)
        why = getattr(exc, "strerror", None) or "not a usable file name"
        raise OSError(errno, f"{name}: {why}") from None
    try:
        info = os.fstat(fd)
        if not stat.S_ISREG(info.st_mode):
            raise OSError(21 if stat.S_ISDIR(info.st_mode) else 22, f"{name}: not a regular file")
        real = _where(fd, path, info)
        if real is None:
            raise DataRootError(f"{name} changed while it was being opened")
        if roots and not any(Path(real).is_relative_to(root) for root in roots):
            raise DataRootError(f"{name} leads outside the allowed data roots")
    except BaseException:
        os.close(fd)
        raise
    return ConfinedFile(fd, name=name, real=real, info=info)


def read_spec_file(path: str | Path, roots: Roots, *, field: str) -> bytes:
    """The bytes of a file a spec field names (e.g. ``region.file``), read from one open file
    checked against the roots: DataRootError when it leads outside them, SpecError when it
    cannot be read, each message starting with the field."""
    try:
        with open_confined(path, roots) as opened:
            return opened.read_bytes()
    except DataRootError as exc:
        raise DataRootError(f"{field}: {exc}") from None
    except OSError as exc:
        raise SpecError(f"{field}: cannot read {exc.strerror or exc}") from None


def _where(fd: int, path: str | Path, info: os.stat_result) -> str | None:
    """The real path of the open file fd (see the module docstring); None when the name no
    longer leads to the file that was opened."""
    try:
        return os.readlink(f"{_PROC_FD}/{fd}")
    except OSError:
        pass
    real = os.path.realpath(path)
    try:
        again = os.stat(real)
    except OSError:
        again = None
    if again is None or (again.st_dev, again.st_ino) != (info.st_dev, info.st_ino):
        return None
    return real
