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
