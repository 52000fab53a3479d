"""The one compile helper: compiled once per process, and still compiled on a read-only
install (numba cannot cache there)."""

from __future__ import annotations

import numpy as np
import pytest

from demaudit.workers import compiled as compile_helper


def _twice(values, out):  # type: ignore[no-untyped-def]
    for i in range(values.size):
        out[i] = 2.0 * values[i]


def test_a_loop_is_compiled_once_and_reused() -> None:
    pytest.importorskip("numba")
    first = compile_helper.compiled(_twice)
    assert compile_helper.compiled(_twice) is first
    out = np.empty(3)
    first(np.array([1.0, -2.5, 4.0]), out)
    np.testing.assert_array_equal(out, [2.0, -5.0, 8.0])


def test_without_a_cache_folder_the_loop_is_compiled_per_process(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    numba = pytest.importorskip("numba")
    real = numba.njit
    asked: list[bool] = []

    def no_cache_folder(*args: object, cache: bool = False, **kwargs: object):  # type: ignore[no-untyped-def]
        asked.append(cache)
        if cache:  # what numba says when no cache locator is available (read-only install)
            raise RuntimeError("cannot cache function: no locator available")
        return real(*args, **kwargs)

    monkeypatch.setattr(numba, "njit", no_cache_folder)
    monkeypatch.setattr(compile_helper, "_COMPILED", {})
    out = np.empty(1)
    compile_helper.compiled(_twice)(np.array([3.0]), out)
    assert out[0] == 6.0 and asked == [True, False]
