"""OpenAPI 3.0, as OGC API - Processes 1.0 asks (conformance class ``oas30``).

FastAPI and pydantic write JSON Schema 2020-12 (OpenAPI 3.1). ``oas30_schema`` rewrites one schema
into an OpenAPI 3.0 schema object (the subset the standard's ``schema.yaml`` allows), and
``openapi30`` rewrites the whole API definition; ``serve_openapi30`` makes the app serve that at its
OpenAPI address as ``application/vnd.oai.openapi+json;version=3.0`` (or ``application/json`` when
that is what the client accepts)::

    anyOf/oneOf [X, {"type": "null"}]   -> X + nullable: true
    type: [T, "null"]                   -> type: T, nullable: true
    const: v                            -> enum: [v]
    exclusiveMinimum: n (a number)      -> minimum: n, exclusiveMinimum: true   (and ...Maximum)
    examples: [e, ...]                  -> example: e
    prefixItems: [A, B]                 -> items: {anyOf: [A, B]}, minItems/maxItems
    $ref with siblings                  -> allOf: [$ref] beside the siblings
    propertyNames, $defs, if/then/else, ... (no 3.0 equivalent) -> dropped
"""

from __future__ import annotations

import copy
from typing import Any

from fastapi import FastAPI, Request
from fastapi.responses import JSONResponse
from starlette.routing import Route

from demaudit.service.api.negotiation import JSON, OPENAPI_30, negotiate

__all__ = ["OAS30_KEYWORDS", "oas30_schema", "openapi30", "serve_openapi30"]

OAS30_KEYWORDS = frozenset(
    {
        "title", "multipleOf", "maximum", "exclusiveMaximum", "minimum", "exclusiveMinimum",
        "maxLength", "minLength", "pattern", "maxItems", "minItems", "uniqueItems",
        "maxProperties", "minProperties", "required", "enum", "type", "not", "allOf", "oneOf",
        "anyOf", "items", "properties", "additionalProperties", "description", "format",
        "default", "nullable", "readOnly", "writeOnly", "example", "deprecated",
        "contentMediaType", "contentEncoding",
    }
)  # fmt: skip
"""The members of a schema object the standard's schema.yaml allows (besides a lone $ref)."""

_SCHEMA_LISTS = ("allOf", "anyOf", "oneOf")


def oas30_schema(schema: Any, *, ref_prefix: tuple[str, str] | None = None) -> Any:
    """The OpenAPI 3.0 form of a JSON Schema (2020-12) schema; ref_prefix (old, new) rewrites
    the start of every ``$ref``."""
    if isinstance(schema, bool):
        return {} if schema else {"not": {}}
    if not isinstance(schema, dict):
        return schema
    schema = dict(schema)
    if "$ref" in schema:
        ref = schema.pop("$ref")
        if ref_prefix and isinstance(ref, str) and ref.startswith(ref_prefix[0]):
            ref = ref_prefix[1] + ref.removeprefix(ref_prefix[0])
        rest = oas30_schema(schema, ref_prefix=ref_prefix)
        return {"$ref": ref} if not rest else {"allOf": [{"$ref": ref}], **rest}
    out, nullable = _types(schema.pop("type", None))
    nullable = _schema_lists(schema, out, ref_prefix) or nullable
    if "const" in schema:
        out["enum"] = [schema.pop("const")]
    _bounds(schema, out)
    examples = schema.pop("examples", None)
    if isinstance(examples, list) and examples:
        out.setdefault("example", examples[0])
    prefix = schema.pop("prefixItems", None)
    if prefix:
        out["items"] = oas30_schema({"anyOf": prefix}, ref_prefix=ref_prefix)
        out.setdefault("minItems", len(prefix))
        out.setdefault("maxItems", len(prefix))
    _other_keywords(schema, out, ref_prefix)
    if nullable:
        out["nullable"] = True
    return out


def _types(kind: Any) -> tuple[dict[str, Any], bool]:
    """The 3.0 members for a ``type`` (one type, or anyOf of several) and whether null is one."""
    out: dict[str, Any] = {}
    if isinstance(kind, list):
        kinds = [k for k in kind if k != "null"]
        if len(kinds) == 1:
            out["type"] = kinds[0]
        elif kinds:
            out["anyOf"] = [{"type": k} for k in kinds]
        return out, "null" in kind
    if kind == "null":
        return out, True
    if kind is not None:
        out["type"] = kind
    return out, False


def _schema_lists(
    schema: dict[str, Any], out: dict[str, Any], ref_prefix: tuple[str, str] | None
) -> bool:
    """Move allOf/anyOf/oneOf from schema into out without their null members (a single member
    is merged in, or kept under allOf); whether a null member was dropped."""
    nullable = False
    for key in _SCHEMA_LISTS:
        members = schema.pop(key, None)
        if members is None:
            continue
        kept = [m for m in members if not (isinstance(m, dict) and m.get("type") == "null")]
        nullable = nullable or len(kept) < len(members)
        converted = [oas30_schema(m, ref_prefix=ref_prefix) for m in kept]
        if len(converted) == 1 and key != "allOf":
            only = converted[0]
            if "$ref" in only or any(k in out for k in only):
                out.setdefault("allOf", []).append(only)
            else:
                out.update(only)
        elif converted:
            out[key] = converted
    return nullable


def _bounds(schema: dict[str, Any], out: dict[str, Any]) -> None:
    """exclusiveMinimum/Maximum as numbers become minimum/maximum with a boolean flag."""
    for bound, inclusive in (("exclusiveMinimum", "minimum"), ("exclusiveMaximum", "maximum")):
        value = schema.pop(bound, None)
        if isinstance(value, bool):
            out[bound] = value
        elif value is not None:
            out[inclusive] = value
            out[bound] = True


def _other_keywords(
    schema: dict[str, Any], out: dict[str, Any], ref_prefix: tuple[str, str] | None
) -> None:
    """The remaining keywords 3.0 allows (subschemas converted); the others are dropped."""
    for key, value in schema.items():
        if key not in OAS30_KEYWORDS or key in out:
            continue
        if key == "properties":
            out[key] = {n: oas30_schema(s, ref_prefix=ref_prefix) for n, s in value.items()}
        elif key in ("items", "not", "additionalProperties") and not isinstance(value, bool):
            out[key] = oas30_schema(value, ref_prefix=ref_prefix)
        elif key == "required" and not value:
            continue
        else:
            out[key] = copy.deepcopy(value)


_REFS = ("#/components/schemas/", "#/components/schemas/")


def _convert_schemas(node: Any) -> Any:
    """Every ``schema`` member below node converted (parameters, bodies, responses, headers)."""
    if isinstance(node, dict):
        return {
            k: oas30_schema(v, ref_prefix=_REFS) if k == "schema" else _convert_schemas(v)
            for k, v in node.items()
        }
    if isinstance(node, list):
        return [_convert_schemas(v) for v in node]
    return node


def openapi30(document: dict[str, Any]) -> dict[str, Any]:
    """An OpenAPI 3.1 document (as FastAPI writes it) rewritten as OpenAPI 3.0.3."""
    out = _convert_schemas({k: v for k, v in document.items() if k not in ("webhooks",)})
    out["openapi"] = "3.0.3"
    info = dict(out.get("info", {}))
    summary = info.pop("summary", None)
    if summary and "description" not in info:
        info["description"] = summary
    license_ = info.get("license")
    if isinstance(license_, dict):
        info["license"] = {k: v for k, v in license_.items() if k != "identifier"}
    out["info"] = info
    components = dict(out.get("components", {}))
    if "schemas" in components:
        components["schemas"] = {
            name: oas30_schema(s, ref_prefix=_REFS) for name, s in components["schemas"].items()
        }
    out["components"] = components
    return out


def serve_openapi30(app: FastAPI) -> None:
    """Serve the app's API definition as OpenAPI 3.0 at ``app.openapi_url`` (replacing
    FastAPI's 3.1 route of the same name, so ``url_for("openapi")`` still finds it)."""
    cached: dict[str, Any] = {}

    async def openapi(request: Request) -> JSONResponse:
        media = negotiate(request, (OPENAPI_30, JSON))
        if "document" not in cached:
            cached["document"] = openapi30(app.openapi())
        return JSONResponse(cached["document"], media_type=media)

    if app.openapi_url is None:
        return
    route = Route(
        app.openapi_url, openapi, methods=["GET"], name="openapi", include_in_schema=False
    )
    routes = app.router.routes
    for index, existing in enumerate(routes):
        if getattr(existing, "name", None) == "openapi":
            routes[index] = route
            return
    routes.append(route)
