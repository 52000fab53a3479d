"""The job spec as a whole (JobSpec) and how it is read: from a mapping or a YAML/JSON file,
with a SpecError naming every offending field."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import yaml
from pydantic import Field, ValidationError, model_validator

from demaudit.workers.errors import SpecError
from demaudit.workers.spec.sections import (
    CheckpointSource,
    Coregistration,
    Derivatives,
    ErrorModel,
    FigureOptions,
    Grading,
    LandCoverSource,
    Options,
    Outliers,
    Recheck,
    RegionSource,
    Section,
    Strata,
    TileSource,
)


class JobSpec(Section):
    """One audit: a test DEM against a reference, over regions."""

    name: str = Field(pattern=r"^[A-Za-z0-9][A-Za-z0-9._-]{0,99}$")
    test: TileSource
    reference: TileSource | None = None
    checkpoints: CheckpointSource | None = None
    region: RegionSource | None = None
    landcover: LandCoverSource | None = None
    strata: Strata = Strata()
    outliers: Outliers = Outliers()
    coregistration: Coregistration | None = None
    grading: Grading = Grading()
    recheck: Recheck = Recheck()
    error_model: ErrorModel | None = None
    derivatives: Derivatives | None = None
    figures: FigureOptions = FigureOptions()
    options: Options = Options()

    @model_validator(mode="after")
    def _some_reference(self) -> JobSpec:
        if self.reference is None and self.checkpoints is None:
            raise ValueError("name a reference (tiles), checkpoints, or both")
        if self.reference is None and self.coregistration is not None:
            raise ValueError("coregistration needs reference tiles")
        return self


def parse_spec(data: dict[str, Any]) -> JobSpec:
    """Validate a spec given as a mapping; raise SpecError naming each offending field."""
    if not isinstance(data, dict):
        raise SpecError(f"a job spec must be a mapping, got {type(data).__name__}")
    try:
        return JobSpec.model_validate(data)
    except ValidationError as exc:
        raise SpecError(format_validation_error(exc)) from None


def format_validation_error(exc: ValidationError) -> str:
    """One line per problem, each starting with the dotted field path."""
    lines = []
    for err in exc.errors():
        field = ".".join(str(p) for p in err["loc"]) or "(spec)"
        message = err["msg"].removeprefix("Value error, ")
        if err["type"] == "extra_forbidden":
            message = "unknown key"
        lines.append(f"{field}: {message}")
    return "invalid job spec: " + "; ".join(lines)


def load_spec_file(path: Path) -> dict[str, Any]:
    """Read a YAML or JSON spec file into a mapping."""
    try:
        text = Path(path).read_text(encoding="utf-8")
    except OSError as exc:
        raise SpecError(f"cannot read job spec {path}: {exc.strerror or exc}") from None
    try:
        is_json = Path(path).suffix.lower() == ".json"
        data = json.loads(text) if is_json else yaml.safe_load(text)
    except (yaml.YAMLError, json.JSONDecodeError) as exc:
        raise SpecError(f"job spec {path} is not valid YAML/JSON: {exc}") from None
    return data  # type: ignore[no-any-return]
