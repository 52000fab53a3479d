"""Test helper: documents validated against the OGC API - Processes 1.0 JSON schemas (vendored
unmodified in tests/data/ogc with their licence; source named in its README.md)."""

from __future__ import annotations

import functools
from pathlib import Path
from typing import Any

import jsonschema
import yaml
from referencing import Registry, Resource
from referencing.jsonschema import DRAFT4

__all__ = ["BASE", "DEM_AUDIT", "SCHEMAS", "validate"]

SCHEMAS = Path(__file__).parents[1] / "data" / "ogc"
BASE = "https://schemas.invalid/ogcapi-processes-1/1.0/"
DEM_AUDIT = "/processes/dem-audit"


@functools.cache
def _registry() -> Registry:
    """Every schema file under its name (their $refs name files relative to each other)."""
    resources = []
    for path in sorted(SCHEMAS.glob("*.yaml")):
        contents = yaml.safe_load(path.read_text(encoding="utf-8"))
        resources.append((BASE + path.name, Resource(contents, specification=DRAFT4)))
    registry: Registry = Registry().with_resources(resources)
    return registry


def validate(document: Any, schema_file: str) -> None:
    """Validate document against one of the standard's schema files. The files are OpenAPI 3.0
    schema objects: Draft 4 semantics (boolean exclusiveMinimum; nullable not a keyword)."""
    validator = jsonschema.Draft4Validator({"$ref": BASE + schema_file}, registry=_registry())
    errors = sorted(validator.iter_errors(document), key=lambda e: list(e.absolute_path))
    assert not errors, "\n".join(
        f"{schema_file} at {'/'.join(map(str, e.absolute_path)) or '(root)'}: {e.message[:300]}"
        for e in errors
    )
