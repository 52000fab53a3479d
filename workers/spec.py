"""The job spec: the one contract shared by the service, the CLI and the workers.

A spec names a test DEM (tiles), a reference (tiles), optional regions to aggregate over and
processing options. It is read from YAML or JSON; relative paths resolve against the folder of the
spec file (or a base folder given by the caller). Unknown keys and inconsistent values are rejected
with a :class:`~workers.errors.SpecError` whose message names the field.
"""

from __future__ import annotations

import glob
import json
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Annotated, Any, Literal

import yaml
from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator
from pyproj import CRS
from pyproj.exceptions import CRSError

from workers.errors import DataRootError, SpecError

Units = Literal["metre", "foot", "us_survey_foot"]
Resampling = Literal["nearest", "bilinear", "cubic", "average"]
ELLIPSOIDAL = "ellipsoidal"

#: How many metres one unit of each allowed height unit is (NIST: the international foot is
#: exactly 0.3048 m; the US survey foot is exactly 1200/3937 m).
METRES_PER_UNIT: dict[str, float] = {
    "metre": 1.0,
    "foot": 0.3048,
    "us_survey_foot": 1200.0 / 3937.0,
}


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class _Heights(_Strict):
    """Heights with their vertical datum and unit."""

    vertical_crs: str = Field(
        default=ELLIPSOIDAL,
        description="'ellipsoidal' (heights above the WGS 84 ellipsoid) or a vertical CRS code "
        "such as EPSG:5773 (EGM96 height).",
    )
    units: Units = Field(default="metre", description="Unit of the heights.")

    @field_validator("vertical_crs")
    @classmethod
    def _known_vertical_crs(cls, value: str) -> str:
        if value == ELLIPSOIDAL:
            return value
        try:
            crs = CRS.from_user_input(value)
        except CRSError as exc:
            raise ValueError(f"unknown vertical CRS {value!r}: {exc}") from None
        if not crs.is_vertical or crs.is_compound:
            raise ValueError(f"{value!r} is not a vertical CRS (expected e.g. EPSG:5773)")
        return value

    @model_validator(mode="after")
    def _units_agree_with_crs(self) -> _Heights:
        if self.vertical_crs == ELLIPSOIDAL:
            return self
        axis_units = {a.unit_name.lower() for a in CRS.from_user_input(self.vertical_crs).axis_info}
        declared = self.units
        crs_in_feet = any("foot" in u for u in axis_units)
        if crs_in_feet != (declared != "metre"):
            raise ValueError(
                f"units {declared!r} disagree with vertical_crs {self.vertical_crs} whose axis "
                f"unit is {', '.join(sorted(axis_units))}"
            )
        return self


class TileSource(_Heights):
    """A set of raster tiles with the vertical datum and unit of their heights."""

    tiles: str | list[str] = Field(description="A glob, a folder, or a list of GeoTIFF paths.")
    nodata: float | None = Field(
        default=None,
        description="A value marking voids, besides the nodata value the tiles declare (e.g. "
        "-9999 when the tiles declare none).",
    )


class CheckpointSource(_Heights):
    """Surveyed checkpoints: CSV (columns named below; '#' lines may hold 'key: value' such as
    'horizontal_crs: EPSG:32632' and 'survey_rmse_m: 0.02') or GeoJSON points."""

    file: str
    crs: str | None = Field(
        default=None,
        description="Horizontal CRS of the points (CSV: else the file's 'horizontal_crs' line; "
        "GeoJSON: else its declared CRS, else EPSG:4326).",
    )
    survey_rmse_m: float | None = Field(
        default=None, ge=0, description="Stated survey accuracy (else the file's header line)."
    )
    id_column: str = "id"
    x_column: str = "easting"
    y_column: str = "northing"
    height_column: str = "height"
    landcover_column: str | None = "landcover"
    unclassified_group: Literal["non_vegetated", "vegetated", "excluded"] = Field(
        default="non_vegetated",
        description="Cover group of points without a land-cover class (no class column, an "
        "empty cell, or no land-cover class table): graded as this group (as unclassified "
        "pixels are), or left out of grading ('excluded').",
    )


Standard = Literal["nssda", "asprs2014", "asprs2023", "quality_level", "user"]


class Grading(_Strict):
    """Which standards to grade against and the class each requires."""

    standards: list[Standard] = ["nssda", "asprs2014", "asprs2023"]
    asprs_class_cm: float = Field(default=10.0, gt=0)
    quality_level: Literal["QL0", "QL1", "QL2", "QL3"] = "QL2"
    nssda_required_accuracy_m: float | None = Field(default=None, gt=0)
    user: dict[
        Literal["required_rmse_m", "required_nva_m", "required_vva_m"],
        Annotated[float, Field(gt=0, allow_inf_nan=False)],
    ] = {}


class RegionSource(_Strict):
    """Polygons to aggregate over: a GeoJSON FeatureCollection and the property naming each."""

    file: str = Field(description="GeoJSON FeatureCollection (CRS as declared, else EPSG:4326).")
    id_property: str = Field(default="code", description="Feature property holding the region id.")


class Options(_Strict):
    """Processing options."""

    resampling: Resampling = Field(
        default="bilinear", description="How the reference is resampled onto the test grid."
    )
    overview_factor: int = Field(
        default=8, ge=1, le=64, description="Decimation of the dh overview map (1:N)."
    )


CoverGroup = Literal["non_vegetated", "vegetated", "excluded"]
OutlierRule = Literal["nmad", "rmse"]


class LandCoverClass(_Strict):
    """One land-cover class: its name and how accuracy standards treat it."""

    name: str
    group: CoverGroup


class LandCoverSource(_Strict):
    """A land-cover raster (any grid; resampled by nearest neighbour onto the test grid)."""

    tiles: str | list[str] = Field(description="A glob, a folder, or a list of GeoTIFF paths.")
    classes: dict[int, LandCoverClass] = Field(
        description="Class value -> name and group (non_vegetated, vegetated or excluded). "
        "Pixels of excluded classes, and of values not listed, leave every statistic."
    )

    @field_validator("classes")
    @classmethod
    def _some_classes(cls, value: dict[int, LandCoverClass]) -> dict[int, LandCoverClass]:
        if not value:
            raise ValueError("list at least one land-cover class")
        return value


class Strata(_Strict):
    """How pixels are split beyond regions: slope bands (degrees, from the reference)."""

    slope_bands_deg: list[float] = Field(
        default=[0.0, 5.0, 15.0, 30.0, 45.0],
        description="Lower edges of the slope bands in degrees; the last band is open-ended.",
    )

    @field_validator("slope_bands_deg")
    @classmethod
    def _increasing(cls, value: list[float]) -> list[float]:
        if (
            not value
            or value[0] != 0
            or any(b <= a for a, b in zip(value, value[1:], strict=False))
        ):
            raise ValueError("slope bands must start at 0 and increase")
        if value[-1] >= 90:
            raise ValueError("slope bands must stay below 90 degrees")
        return value


class Outliers(_Strict):
    """The rule that flags blunders for the 'after outlier removal' statistics."""

    rule: OutlierRule = Field(
        default="nmad",
        description="'nmad': |dh - median| > factor x NMAD; 'rmse': |dh| > factor x RMSE.",
    )
    factor: float = Field(default=5.0, gt=0)


class Coregistration(_Strict):
    """Find (and optionally remove) a systematic shift before judging accuracy (Nuth & Kääb)."""

    method: Literal["nuth_kaab"] = "nuth_kaab"
    estimate_from: Literal["job", "tile"] = Field(
        default="job",
        description="Which estimate is applied: one for the whole job, or each tile's own.",
    )
    job_estimate: Literal["tile_median", "pooled"] = Field(
        default="tile_median",
        description="How the job-wide estimate is formed: the median of the tiles' own "
        "estimates (robust to a bad delivery block) or one fit pooling every stable pixel "
        "(works where single tiles are too flat).",
    )
    apply: bool = Field(default=True, description="Also report statistics after the correction.")
    fit_tilt: bool = Field(default=True, description="Fit and remove a planar ramp as well.")
    fit_elevation_bias: bool = Field(
        default=False, description="Fit and remove a bias proportional to elevation as well."
    )
    max_iterations: int = Field(default=8, ge=1, le=50)
    tolerance_px: float = Field(default=0.01, gt=0, le=1)
    tile_stride: int = Field(
        default=1, ge=1, description="Use every n-th test tile for the job estimate."
    )


class Recheck(_Strict):
    """When a nightly re-check flags a tile or region as regressed."""

    nmad_worse_fraction: float = Field(default=0.10, ge=0)
    nmad_worse_m: float = Field(default=0.05, ge=0)
    median_moved_m: float = Field(default=0.05, ge=0)


class JobSpec(_Strict):
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
    options: Options = Options()

    @model_validator(mode="after")
    def _some_reference(self) -> JobSpec:
        if self.reference is None and self.checkpoints is None:
            raise ValueError("name a reference (tiles), checkpoints, or both")
        if self.reference is None and self.coregistration is not None:
            raise ValueError("coregistration needs reference tiles")
        return self


@dataclass(frozen=True)
class ResolvedJob:
    """A validated spec with every path made absolute and every tile glob expanded."""

    spec: JobSpec
    test_tiles: tuple[Path, ...]
    reference_tiles: tuple[Path, ...]
    region_file: Path | None
    landcover_tiles: tuple[Path, ...] = ()
    checkpoint_file: Path | None = None


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


def resolve(
    spec: JobSpec, *, base_dir: Path, data_roots: Sequence[Path] | None = None
) -> ResolvedJob:
    """Make paths absolute against base_dir, expand tile globs and check the files exist.

    When data_roots is given, every path must lie inside one of them (DataRootError otherwise).
    """
    roots = [Path(r).resolve() for r in data_roots] if data_roots else None
    test = _expand_tiles(spec.test.tiles, base_dir=base_dir, field="test.tiles", roots=roots)
    ref: tuple[Path, ...] = ()
    if spec.reference is not None:
        ref = _expand_tiles(
            spec.reference.tiles, base_dir=base_dir, field="reference.tiles", roots=roots
        )
    checkpoint_file = None
    if spec.checkpoints is not None:
        checkpoint_file = _resolve_path(spec.checkpoints.file, base_dir, "checkpoints.file", roots)
        if not checkpoint_file.is_file():
            raise SpecError(f"checkpoints.file: no such file {checkpoint_file}")
    region_file = None
    if spec.region is not None:
        region_file = _resolve_path(spec.region.file, base_dir, "region.file", roots)
        if not region_file.is_file():
            raise SpecError(f"region.file: no such file {region_file}")
    landcover: tuple[Path, ...] = ()
    if spec.landcover is not None:
        landcover = _expand_tiles(
            spec.landcover.tiles, base_dir=base_dir, field="landcover.tiles", roots=roots
        )
    return ResolvedJob(spec, test, ref, region_file, landcover, checkpoint_file)


def resolve_in_roots(spec: JobSpec, *, data_roots: Sequence[Path] | None) -> ResolvedJob:
    """Resolve a spec that arrived without a file (over HTTP, from a schedule): relative paths
    against the first data root (the working folder when there are none), every file inside
    the roots, symlinks included."""
    base_dir = Path(data_roots[0]) if data_roots else Path.cwd()
    return resolve(spec, base_dir=base_dir, data_roots=data_roots)


def _resolve_path(raw: str, base_dir: Path, field: str, roots: list[Path] | None) -> Path:
    path = Path(raw).expanduser()
    if not path.is_absolute():
        path = base_dir / path
    path = path.resolve()
    if roots is not None and not any(path.is_relative_to(r) for r in roots):
        raise DataRootError(f"{field}: {path} lies outside the allowed data roots")
    return path


def _expand_tiles(
    tiles: str | list[str], *, base_dir: Path, field: str, roots: list[Path] | None
) -> tuple[Path, ...]:
    patterns = [tiles] if isinstance(tiles, str) else list(tiles)
    found: list[Path] = []
    for pattern in patterns:
        path = _resolve_path(pattern, base_dir, field, roots)
        if path.is_dir():
            matches = sorted(p for p in path.iterdir() if p.suffix.lower() in {".tif", ".tiff"})
        elif glob.has_magic(str(path)):
            matches = sorted(Path(p) for p in glob.glob(str(path)))
        elif path.is_file():
            matches = [path]
        else:
            raise SpecError(f"{field}: no such file or folder {path}")
        if not matches:
            raise SpecError(f"{field}: {pattern!r} matches no tiles (looked in {path})")
        for match in matches:  # a match may be a symlink leading out of the roots
            real = match.resolve()
            if roots is not None and not any(real.is_relative_to(r) for r in roots):
                raise DataRootError(f"{field}: {match.name} leads outside the allowed data roots")
        found.extend(matches)
    unique = tuple(dict.fromkeys(found))
    return unique
