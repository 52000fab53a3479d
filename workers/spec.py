"""The job spec: the one contract shared by the service, the CLI and the workers.

A spec names a test DEM (tiles), a reference (tiles), optional regions to aggregate over and
processing options. It is read from YAML or JSON; relative paths resolve against the folder of the
spec file (or a base folder given by the caller). Unknown keys and inconsistent values are rejected
with a :class:`~demaudit.workers.errors.SpecError` whose message names the field.

Bounds (so a request cannot make the server list folders for minutes): a path is at most
MAX_PATH_CHARS characters with no control character (NUL included); a tile list holds at most
MAX_PATHS_PER_LIST entries, of which at most MAX_GLOBS_PER_LIST are glob patterns; the files
a field's patterns and folders expand to are counted as they are listed, and more than
MAX_FILES_PER_FIELD is refused without listing further. Paths in messages are shown relative
to their data root (workers/inputs/confine.py: shown); without data roots as resolved.
"""

from __future__ import annotations

import fnmatch
import glob
import json
import os
from collections.abc import Callable, Iterable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Annotated, Any, Literal

import yaml
from pydantic import (
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Field,
    ValidationError,
    field_validator,
    model_validator,
)
from pydantic.json_schema import WithJsonSchema
from pyproj import CRS
from pyproj.exceptions import CRSError

from demaudit.workers.errors import DataRootError, SpecError
from demaudit.workers.inputs.confine import Roots, real_roots, shown

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

    tiles: TilePaths = Field(
        description="A glob, a folder, or a list of GeoTIFF paths (at most 1000 entries, of "
        "which at most 100 globs)."
    )
    nodata: float | None = Field(
        default=None,
        description="A value marking voids, besides the nodata value the tiles declare (e.g. "
        "-9999 when the tiles declare none).",
    )


class CheckpointSource(_Heights):
    """Surveyed checkpoints: CSV (columns named below; '#' lines may hold 'key: value' such as
    'horizontal_crs: EPSG:32632' and 'survey_rmse_m: 0.02') or GeoJSON points."""

    file: SpecPath
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

    standards: list[Standard] = Field(default=["nssda", "asprs2014", "asprs2023"], max_length=10)
    asprs_class_cm: float = Field(default=10.0, gt=0)
    quality_level: Literal["QL0", "QL1", "QL2", "QL3"] = "QL2"
    nssda_required_accuracy_m: float | None = Field(default=None, gt=0)
    user: dict[
        Literal["required_rmse_m", "required_nva_m", "required_vva_m"],
        Annotated[float, Field(gt=0, allow_inf_nan=False)],
    ] = {}


class RegionSource(_Strict):
    """Polygons to aggregate over: a GeoJSON FeatureCollection and the property naming each."""

    file: SpecPath = Field(
        description="GeoJSON FeatureCollection (CRS as declared, else EPSG:4326)."
    )
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

    tiles: TilePaths = Field(
        description="A glob, a folder, or a list of GeoTIFF paths (at most 1000 entries, of "
        "which at most 100 globs)."
    )
    classes: dict[int, LandCoverClass] = Field(
        max_length=1000,
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
        max_length=32,
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


class ErrorModel(_Strict):
    """Opt-in error model on stable terrain: spread by slope, spatial correlation, standard
    errors of regional figures (workers/uncertainty/error_model.py). Costs more than the rest of
    the audit."""

    max_distance_m: float = Field(
        default=5000.0, gt=0, description="Longest pair distance of the empirical variogram."
    )
    seed: int = Field(default=0, ge=0, description="Seed of the pixel samples (reproducible).")
    samples_per_tile: int = Field(
        default=2000, ge=10, le=100_000, description="Stable pixels sampled per test tile."
    )
    max_samples: int = Field(
        default=100_000, ge=100, le=2_000_000, description="Samples kept for the variogram."
    )


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
    error_model: ErrorModel | None = None
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
    """A validated spec with every path made absolute and every tile glob expanded.

    ``data_roots`` (resolved) confine every read of the job's files (workers/inputs/confine.py);
    None
    when the job was resolved without roots."""

    spec: JobSpec
    test_tiles: tuple[Path, ...]
    reference_tiles: tuple[Path, ...]
    region_file: Path | None
    landcover_tiles: tuple[Path, ...] = ()
    checkpoint_file: Path | None = None
    data_roots: Roots = None

    def shown(self, path: str | Path | None) -> str:
        """path as messages and summary.json show it (relative to its data root)."""
        return "(none)" if path is None else shown(path, self.data_roots)


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

    When data_roots is given, every path must lie inside one of them (DataRootError otherwise),
    and the job's reads stay confined to them (ResolvedJob.data_roots). Problems name the field;
    paths in messages are relative to their data root.
    """
    roots = real_roots(data_roots)
    test = _expand_tiles(spec.test.tiles, base_dir=base_dir, field="test.tiles", roots=roots)
    ref: tuple[Path, ...] = ()
    if spec.reference is not None:
        ref = _expand_tiles(
            spec.reference.tiles, base_dir=base_dir, field="reference.tiles", roots=roots
        )
    checkpoint_file = None
    if spec.checkpoints is not None:
        checkpoint_file = _resolve_file(spec.checkpoints.file, base_dir, "checkpoints.file", roots)
    region_file = None
    if spec.region is not None:
        region_file = _resolve_file(spec.region.file, base_dir, "region.file", roots)
    landcover: tuple[Path, ...] = ()
    if spec.landcover is not None:
        landcover = _expand_tiles(
            spec.landcover.tiles, base_dir=base_dir, field="landcover.tiles", roots=roots
        )
    return ResolvedJob(spec, test, ref, region_file, landcover, checkpoint_file, roots)


def resolve_in_roots(spec: JobSpec, *, data_roots: Sequence[Path] | None) -> ResolvedJob:
    """Resolve a spec that arrived without a file (over HTTP, from a schedule): relative paths
    against the first data root (the working folder when there are none), every file inside
    the roots, symlinks included."""
    base_dir = Path(data_roots[0]) if data_roots else Path.cwd()
    return resolve(spec, base_dir=base_dir, data_roots=data_roots)


def _resolve_path(raw: str, base_dir: Path, field: str, roots: Roots) -> Path:
    """raw made absolute and resolved; SpecError naming the field for a path that cannot be a
    path (NUL, too long, an unknown ~user), DataRootError when it lies outside the roots."""
    if "\0" in raw or len(raw) > MAX_PATH_CHARS:
        raise SpecError(f"{field}: not a usable path (NUL byte, or over {MAX_PATH_CHARS} chars)")
    try:
        path = Path(raw).expanduser()
    except RuntimeError:  # pathlib: no home folder for that user
        user = raw[1:].split("/", 1)[0]
        raise SpecError(f"{field}: cannot expand '~{user}': no such user") from None
    if not path.is_absolute():
        path = base_dir / path
    try:
        path = path.resolve()
    except (OSError, ValueError) as exc:
        why = getattr(exc, "strerror", None) or str(exc)
        raise SpecError(f"{field}: {raw!r} cannot be resolved: {why}") from None
    if roots is not None and not any(path.is_relative_to(r) for r in roots):
        raise DataRootError(f"{field}: {raw!r} lies outside the allowed data roots")
    return path


def _resolve_file(raw: str, base_dir: Path, field: str, roots: Roots) -> Path:
    path = _resolve_path(raw, base_dir, field, roots)
    if not _is(path.is_file):
        raise SpecError(f"{field}: no such file {shown(path, roots)}")
    return path


def _is(check: Callable[[], bool]) -> bool:
    """path.is_file() and the like, False where the OS cannot say (e.g. a name too long)."""
    try:
        return check()
    except (OSError, ValueError):
        return False


def _expand_tiles(
    tiles: str | list[str], *, base_dir: Path, field: str, roots: Roots
) -> tuple[Path, ...]:
    patterns = [tiles] if isinstance(tiles, str) else list(tiles)
    found: list[Path] = []
    budget = [MAX_FILES_PER_FIELD]
    listings: dict[Path, list[str]] = {}  # a folder many patterns look into is listed once
    for pattern in patterns:
        path = _resolve_path(pattern, base_dir, field, roots)
        if _is(path.is_dir):
            matches = sorted(_listed(_folder_tiles(path), budget, field))
        elif glob.has_magic(str(path)):
            matches = sorted(_listed(_globbed(path, listings), budget, field))
        elif _is(path.is_file):
            matches = [path]
        else:
            raise SpecError(f"{field}: no such file or folder {shown(path, roots)}")
        if not matches:
            raise SpecError(
                f"{field}: {pattern!r} matches no tiles (looked in {shown(path, roots)})"
            )
        for match in matches:  # a match may be a symlink leading out of the roots
            real = match.resolve()
            if roots is not None and not any(real.is_relative_to(r) for r in roots):
                raise DataRootError(
                    f"{field}: {shown(match, roots)} leads outside the allowed data roots"
                )
        found.extend(matches)
    unique = tuple(dict.fromkeys(found))
    return unique


def _globbed(pattern: Path, listings: dict[Path, list[str]]) -> Iterator[Path]:
    """What glob.glob gives for pattern; with magic in the file name only, from one listing of
    its folder per resolve (names starting with '.' only for a pattern starting with '.')."""
    folder, name = pattern.parent, pattern.name
    if glob.has_magic(str(folder)):
        yield from map(Path, glob.iglob(str(pattern)))
        return
    if folder not in listings:
        try:
            listings[folder] = sorted(os.listdir(folder))
        except OSError:
            listings[folder] = []
    hidden = name.startswith(".")
    for entry in fnmatch.filter(listings[folder], name):
        if hidden or not entry.startswith("."):
            yield folder / entry


def _folder_tiles(folder: Path) -> Iterator[Path]:
    return (p for p in folder.iterdir() if p.suffix.lower() in {".tif", ".tiff"})


def _listed(paths: Iterable[Path], budget: list[int], field: str) -> Iterator[Path]:
    """paths, counted against the field's budget of files (SpecError once it is spent)."""
    for path in paths:
        budget[0] -= 1
        if budget[0] < 0:
            raise SpecError(
                f"{field}: the patterns and folders list more than {MAX_FILES_PER_FIELD:,} "
                "files; split the job"
            )
        yield path
