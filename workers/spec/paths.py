"""Bounds on the paths a spec may give, checked while the spec is validated (before any file
is listed), so a request cannot make the server list folders for minutes.

A path is at most MAX_PATH_CHARS characters with no control character (NUL included); a tile
list holds at most MAX_PATHS_PER_LIST entries, of which at most MAX_GLOBS_PER_LIST are glob
patterns. MAX_FILES_PER_FIELD bounds what a field's patterns and folders expand to
(workers/spec/resolution.py counts the files as they are listed).
"""

from __future__ import annotations

import glob
from typing import Annotated

from pydantic import BeforeValidator
from pydantic.json_schema import WithJsonSchema

#: Longest path a spec may give (characters); Linux allows 4,096 bytes, data paths need far less.
MAX_PATH_CHARS = 1024
#: Entries of one tile list (test.tiles, reference.tiles, landcover.tiles).
MAX_PATHS_PER_LIST = 1000
#: Glob patterns among them (each lists a folder).
MAX_GLOBS_PER_LIST = 100
#: Files the patterns and folders of one field may expand to (listing stops beyond).
MAX_FILES_PER_FIELD = 100_000


def _path_problem(value: str) -> str | None:
    if not value:
        return "an empty path"
    if len(value) > MAX_PATH_CHARS:
        return f"a path of {len(value):,} characters (at most {MAX_PATH_CHARS:,})"
    if any(ord(c) < 32 or ord(c) == 127 for c in value):
        return "a path may not hold control characters (NUL, newline, ...)"
    return None


def _plain_path(value: object) -> object:
    problem = _path_problem(value) if isinstance(value, str) else None
    if problem:
        raise ValueError(problem)
    return value


def _tile_entries(value: object) -> object:
    """test.tiles and the like: a path, or a list of paths with few globs (see module bounds)."""
    if isinstance(value, str):
        return _plain_path(value)
    if not isinstance(value, list):
        return value  # the type check says what is wrong
    if not value or len(value) > MAX_PATHS_PER_LIST:
        raise ValueError(f"list 1 to {MAX_PATHS_PER_LIST:,} paths (found {len(value):,})")
    for number, entry in enumerate(value):
        problem = _path_problem(entry) if isinstance(entry, str) else "not a string"
        if problem:
            raise ValueError(f"entry {number}: {problem}")
    globs = sum(1 for p in value if glob.has_magic(p))
    if globs > MAX_GLOBS_PER_LIST:
        raise ValueError(
            f"at most {MAX_GLOBS_PER_LIST} glob patterns per list (found {globs:,}); use fewer, "
            "wider patterns or a folder"
        )
    return value


_PATH_SCHEMA = {"type": "string", "minLength": 1, "maxLength": MAX_PATH_CHARS}
SpecPath = Annotated[str, BeforeValidator(_plain_path), WithJsonSchema(_PATH_SCHEMA)]
TilePaths = Annotated[
    str | list[str],
    BeforeValidator(_tile_entries),
    WithJsonSchema(
        {
            "anyOf": [
                _PATH_SCHEMA,
                {
                    "type": "array",
                    "items": _PATH_SCHEMA,
                    "minItems": 1,
                    "maxItems": MAX_PATHS_PER_LIST,
                },
            ]
        }
    ),
]
