"""Zarr nodes a worker writes to tile after tile, opened once per process instead of once per
tile (opening reads the node's metadata: about 2 ms a tile for the overview array and the tile
summaries group together).

Before each use the node's metadata file (zarr.json, a few hundred bytes) is read again: when it
is gone (a dismissed job's store was removed) opening fails as it did before, so nothing is made
again; when it differs (the store was made anew with another layout), the node is opened again:
nothing is written through stale metadata.
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from collections.abc import Callable
from pathlib import Path
from typing import Any

_KEEP = 8  # nodes kept open per process (a worker serves one or two jobs at a time)
_OPEN: OrderedDict[tuple[str, str], tuple[bytes, Any]] = OrderedDict()
_LOCK = threading.Lock()


def opened(kind: str, node_path: str | Path, open_node: Callable[[], Any]) -> Any:
    """The node at node_path (a folder holding zarr.json) as open_node() opens it, reused while
    its zarr.json holds the same metadata; ``kind`` tells apart different openings of one path.
    FileNotFoundError (or what open_node raises) when the node is gone."""
    key = (kind, str(node_path))
    try:
        stamp = (Path(node_path) / "zarr.json").read_bytes()
    except FileNotFoundError:
        with _LOCK:
            _OPEN.pop(key, None)
        raise
    with _LOCK:
        known = _OPEN.get(key)
        if known is not None and known[0] == stamp:
            _OPEN.move_to_end(key)
            return known[1]
    node = open_node()
    with _LOCK:
        _OPEN[key] = (stamp, node)
        while len(_OPEN) > _KEEP:
            _OPEN.popitem(last=False)
    return node
