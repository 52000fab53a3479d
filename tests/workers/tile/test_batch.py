"""Several tiles in one task (workers/tile/batch.py): each tile's result is what it gets alone,
in order, and a tile whose call raises fails alone with the error named."""

from __future__ import annotations

from pathlib import Path

from demaudit.workers.tile.batch import TileCall, audit_tiles
from demaudit.workers.tile.records import FAILED, OK
from demaudit.workers.tile.task import TileOptions, audit_and_store
from tests.workers.outputs.test_tile_store import tile_pair


def test_each_tile_gets_its_own_result_and_a_raising_call_fails_alone(tmp_path: Path) -> None:
    test, ref = tile_pair(tmp_path)
    good = TileCall(test.tile_id, (test, [ref], [], TileOptions()))
    broken = TileCall("broken", (test,))  # too few arguments: audit_and_store raises
    first, failed, again = audit_tiles([good, broken, good])
    alone = audit_and_store(test, [ref], [], TileOptions())
    assert (first.tile_id, first.status) == (again.tile_id, again.status) == (test.tile_id, OK)
    assert first.summary.count == again.summary.count == alone.summary.count == 40 * 50
    assert first.statistics == alone.statistics
    assert (failed.tile_id, failed.status) == ("broken", FAILED)
    assert failed.reason is not None
    assert failed.reason.startswith("task failed on the cluster: TypeError:")
    assert audit_tiles([]) == []


def test_a_worker_loads_no_scipy_module_until_a_job_needs_one() -> None:
    # a worker imports the tile modules at its first tile task, in every job the embedded
    # cluster starts: scipy.ndimage (co-registration) and scipy.optimize / scipy.spatial (the
    # error model) cost about 0.4 s of that and only serve jobs that ask for them
    import subprocess
    import sys

    heavy = ["scipy.ndimage", "scipy.optimize", "scipy.spatial"]
    script = (
        "import sys, demaudit.workers.tile.batch, demaudit.workers.tile.task; "
        f"print([m for m in {heavy!r} if m in sys.modules])"
    )
    out = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"
