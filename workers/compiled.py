"""Compiling the numeric loops with numba (pure helper): each loop is compiled, or loaded from
numba's disk cache beside its module, once per process.

``AVAILABLE`` is False when numba is not installed; callers then take their numpy path.
"""

from __future__ import annotations

from collections.abc import Callable
from importlib.util import find_spec
from typing import Any

AVAILABLE = find_spec("numba") is not None  # numba itself is imported at the first compile
_COMPILED: dict[Callable[..., Any], Callable[..., Any]] = {}


def compiled(loop: Callable[..., Any]) -> Callable[..., Any]:
    """The numba-compiled version of ``loop`` (nopython, releasing the GIL), made once per
    process; cached on disk beside the module (compiled per process when that folder is not
    writable, e.g. a read-only install)."""
    found = _COMPILED.get(loop)
    if found is None:
        from numba import njit

        try:
            found = njit(cache=True, nogil=True)(loop)
        except RuntimeError:  # no writable cache folder
            found = njit(cache=False, nogil=True)(loop)
        _COMPILED[loop] = found
    return found
