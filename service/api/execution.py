"""An OGC execute request (OGC API - Processes - Part 1: Core 1.0, execute.yaml) made into a
job spec and the job's choice of outputs.

::

    {"inputs": {"name": "x",                      an inline value
                "test": {"value": {...}},         a qualified value (mediaType etc. beside it)
                "region": {"href": "r.json"}},    a reference: a JSON/YAML file in the data roots
     "outputs": {"summary": {}},                  which outputs the results show (default: all)
     "response": "document" | "raw",              a results document, or one output as is
                                                  (summary: the document; results: 204 + Link)
     "subscriber": {...}}                         refused: callbacks are not offered

``spec_inputs`` unwraps the inputs (a reference is read from a file inside the data roots; remote
URLs are refused, never fetched), ``Execution.of`` checks outputs, response and subscriber.
``save``/``load`` keep a job's Execution beside its outputs (``<results>/.execution/<id>.json``).
"""

from __future__ import annotations

import json
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal
from urllib.parse import unquote, urlsplit

import yaml

from demaudit.service.api.problems import ProblemError
from demaudit.workers.errors import DataRootError, SpecError
from demaudit.workers.outputs.layout import execution_record

__all__ = [
    "MAX_REFERENCED_BYTES",
    "OUTPUTS",
    "Execution",
    "NotSupportedError",
    "forget",
    "load",
    "save",
    "spec_inputs",
]

JSON = "application/json"
ZARR = "application/vnd+zarr"
OUTPUTS: dict[str, dict[str, Any]] = {
    "summary": {"mediaType": JSON, "transmission": ("value", "reference")},
    "results": {"mediaType": ZARR, "transmission": ("reference",)},
}
"""The process's outputs: media type and how each can be transmitted."""
MAX_REFERENCED_BYTES = 1 << 20
_QUALIFIERS = frozenset({"value", "mediaType", "encoding", "schema"})
_LINK = frozenset({"href", "rel", "type", "hreflang", "title"})
ResponseType = Literal["document", "raw"]


class NotSupportedError(ProblemError):
    """A member of the execute request this server does not offer."""

    status, type, title = 400, "urn:demaudit:problem:not-supported", "Not supported"


class NoSuchOutputError(ProblemError):
    """An output the process does not have."""

    status, type, title = 400, "urn:demaudit:problem:no-such-output", "No such output"


@dataclass(frozen=True)
class Execution:
    """What an execute request asked of its results: the outputs, and document or raw."""

    outputs: tuple[str, ...] = tuple(OUTPUTS)
    response: ResponseType = "document"

    @classmethod
    def of(
        cls,
        *,
        outputs: Mapping[str, Any] | None,
        response: str | None,
        subscriber: Any,
    ) -> Execution:
        """Check the request's outputs, response and subscriber members."""
        if subscriber is not None:
            raise NotSupportedError(
                "subscriber: callbacks are not offered (the 'callback' conformance class is not "
                "declared); poll the job's status document instead"
            )
        chosen = tuple(OUTPUTS) if not outputs else tuple(outputs)
        for name in chosen:
            if name not in OUTPUTS:
                raise NoSuchOutputError(
                    f"outputs.{name}: the process has no such output; "
                    f"its outputs are {', '.join(OUTPUTS)}"
                )
            wanted = (outputs or {}).get(name)
            _check_output(name, {} if wanted is None else wanted)
        kind: ResponseType = "raw" if response == "raw" else "document"
        if kind == "raw" and len(chosen) != 1:
            raise NotSupportedError(
                "response: 'raw' is offered for one output at a time (no multipart): send "
                '"outputs": {"summary": {}} for the summary document itself, or '
                '{"results": {}} for a Link header naming results.zarr'
            )
        return cls(outputs=chosen, response=kind)

    def to_json(self) -> dict[str, Any]:
        return {"outputs": list(self.outputs), "response": self.response}


def _check_output(name: str, wanted: Mapping[str, Any]) -> None:
    if not isinstance(wanted, Mapping):
        raise NotSupportedError(f"outputs.{name}: must be an object (format, transmissionMode)")
    unknown = set(wanted) - {"format", "transmissionMode"}
    if unknown:
        raise NotSupportedError(f"outputs.{name}: unknown member(s) {', '.join(sorted(unknown))}")
    format_ = wanted.get("format") or {}
    if not isinstance(format_, Mapping):
        raise NotSupportedError(f"outputs.{name}.format: must be an object (mediaType)")
    media = format_.get("mediaType")
    if media is not None and media != OUTPUTS[name]["mediaType"]:
        raise NotSupportedError(
            f"outputs.{name}.format.mediaType: offered as {OUTPUTS[name]['mediaType']} only"
        )
    mode = wanted.get("transmissionMode")
    if mode is not None and mode not in OUTPUTS[name]["transmission"]:
        raise NotSupportedError(
            f"outputs.{name}.transmissionMode: {name} is transmitted by "
            f"{' or '.join(OUTPUTS[name]['transmission'])} only"
        )


def spec_inputs(inputs: Mapping[str, Any], *, data_roots: Sequence[Path] | None) -> dict[str, Any]:
    """The job spec the inputs stand for: qualified values unwrapped, references read (files
    inside data_roots only; relative ones against the first root). Raises DataRootError (403)
    for a file outside the roots, NotSupportedError for a remote reference, SpecError naming
    ``inputs.<name>`` for a file that cannot be read or parsed."""
    return {name: _input_value(name, value, data_roots) for name, value in inputs.items()}


def _input_value(name: str, value: Any, data_roots: Sequence[Path] | None) -> Any:
    if not isinstance(value, dict):
        return value
    if "value" in value and set(value) <= _QUALIFIERS:
        media = value.get("mediaType")
        if media is not None and media != JSON:
            raise NotSupportedError(f"inputs.{name}.mediaType: only {JSON} values are taken")
        return value["value"]
    if "href" in value and set(value) <= _LINK and isinstance(value["href"], str):
        return _referenced(name, value["href"], data_roots)
    return value


def _referenced(name: str, href: str, data_roots: Sequence[Path] | None) -> Any:
    field = f"inputs.{name}.href"
    try:
        parts = urlsplit(href)
    except ValueError:
        raise SpecError(f"{field}: not a usable reference") from None
    if parts.scheme not in ("", "file") or parts.netloc not in ("", "localhost"):
        raise NotSupportedError(
            f"{field}: remote references are not supported; give the path of a JSON or YAML "
            "file inside the data roots (or the value itself)"
        )
    raw = unquote(parts.path) if parts.scheme == "file" else href
    if not raw or "\0" in raw or len(raw) > 4096:
        raise SpecError(f"{field}: not a usable path")
    roots = [Path(r).resolve() for r in data_roots] if data_roots else None
    base = roots[0] if roots else Path.cwd()
    try:
        path = (base / raw).resolve()
    except (OSError, ValueError, RuntimeError):
        raise SpecError(f"{field}: {href!r} cannot be resolved") from None
    if roots is not None and not any(path.is_relative_to(r) for r in roots):
        raise DataRootError(f"{field}: {href!r} lies outside the allowed data roots")
    try:
        with path.open("rb") as f:
            data = f.read(MAX_REFERENCED_BYTES + 1)
    except OSError:
        raise SpecError(f"{field}: no readable file {href!r}") from None
    if len(data) > MAX_REFERENCED_BYTES:
        raise SpecError(f"{field}: {href!r} is over {MAX_REFERENCED_BYTES} bytes")
    try:
        return yaml.safe_load(data.decode("utf-8"))  # JSON is YAML
    except (UnicodeDecodeError, yaml.YAMLError):
        raise SpecError(f"{field}: {href!r} is not a JSON or YAML document") from None


def _path(results_dir: Path, job_id: str) -> Path:
    return execution_record(results_dir, job_id)


def save(results_dir: Path, job_id: str, execution: Execution) -> None:
    """Keep what the execute request asked of job_id's results (only when not the default)."""
    if execution == Execution():
        return
    path = _path(results_dir, job_id)
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(json.dumps(execution.to_json()), encoding="utf-8")


def load(results_dir: Path, job_id: str) -> Execution:
    """What the execute request of job_id asked (the default when nothing was kept)."""
    try:
        data = json.loads(_path(results_dir, job_id).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return Execution()
    response: ResponseType = "raw" if data.get("response") == "raw" else "document"
    return Execution(outputs=tuple(data.get("outputs") or OUTPUTS), response=response)


def forget(results_dir: Path, job_id: str) -> None:
    """Drop what was kept for job_id (it was dismissed)."""
    _path(results_dir, job_id).unlink(missing_ok=True)
