"""The client's allocator settings: arrays made and dropped again reuse the heap's pages."""

from __future__ import annotations

import os
import platform
import subprocess
import sys

import pytest

_FAULTS = """
import resource, sys
import numpy as np
from demaudit.service.run.allocator import tune_allocator
took = tune_allocator() if sys.argv[1] == "tuned" else None
bins = np.arange(55_136, dtype=np.int32)  # a tile's histogram: 55,136 bins
np.diff(bins.astype(np.int64))  # the first arrays' pages are new either way
before = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
for _ in range(200):
    np.diff(bins.astype(np.int64))  # two arrays of 430 KiB made and dropped (packing.py)
print(took, resource.getrusage(resource.RUSAGE_SELF).ru_minflt - before)
"""


def _faults(mode: str) -> tuple[str, int]:
    # glibc's own defaults in both: no MALLOC_* from this process (a cluster started earlier in
    # the same test run may have left the workers' settings in os.environ)
    env = {k: v for k, v in os.environ.items() if not k.startswith("MALLOC_")}
    out = subprocess.run(
        [sys.executable, "-c", _FAULTS, mode], capture_output=True, text=True, check=True, env=env
    ).stdout.split()
    return out[0], int(out[1])


@pytest.mark.skipif(platform.libc_ver()[0] != "glibc", reason="mallopt's thresholds are glibc's")
def test_tuned_process_reuses_the_heap() -> None:
    """Untuned, glibc maps such arrays afresh (measured: about 36,600 page faults for the 200
    rounds); tuned, the pages stay in the heap and the loop faults almost nothing in."""
    took, tuned = _faults("tuned")
    _, default = _faults("default")
    assert took == "True"
    assert default > 100 * 200  # about 180 a round: the arrays are new mappings each time
    assert tuned < 1_000
