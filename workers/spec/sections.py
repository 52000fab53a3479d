"""The sections of a job spec: one strict, frozen pydantic model per top-level key
(test/reference, checkpoints, region, landcover, strata, outliers, coregistration, grading,
recheck, error_model, options). JobSpec (workers/spec/job.py) puts them together; a new
section is a model here plus one field there.
"""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator
from pyproj import CRS
from pyproj.exceptions import CRSError

from demaudit.workers.spec.paths import SpecPath, TilePaths

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


class Section(BaseModel):
    """Base of every spec model: unknown keys are refused, values are frozen."""

    model_config = ConfigDict(extra="forbid", frozen=True)


class _Heights(Section):
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


class Grading(Section):
    """Which standards to grade against and the class each requires."""

    standards: list[Standard] = Field(default=["nssda", "asprs2014", "asprs2023"], max_length=10)
    asprs_class_cm: float = Field(default=10.0, gt=0)
    quality_level: Literal["QL0", "QL1", "QL2", "QL3"] = "QL2"
    nssda_required_accuracy_m: float | None = Field(default=None, gt=0)
    user: dict[
        Literal["required_rmse_m", "required_nva_m", "required_vva_m"],
        Annotated[float, Field(gt=0, allow_inf_nan=False)],
    ] = {}


class RegionSource(Section):
    """Polygons to aggregate over: a GeoJSON FeatureCollection and the property naming each."""

    file: SpecPath = Field(
        description="GeoJSON FeatureCollection (CRS as declared, else EPSG:4326)."
    )
    id_property: str = Field(default="code", description="Feature property holding the region id.")


class Options(Section):
    """Processing options."""

    resampling: Resampling = Field(
        default="bilinear", description="How the reference is resampled onto the test grid."
    )
    overview_factor: int = Field(
        default=8, ge=1, le=64, description="Decimation of the dh overview map (1:N)."
    )


CoverGroup = Literal["non_vegetated", "vegetated", "excluded"]
OutlierRule = Literal["nmad", "rmse"]


class LandCoverClass(Section):
    """One land-cover class: its name and how accuracy standards treat it."""

    name: str
    group: CoverGroup


class LandCoverSource(Section):
    """A land-cover raster (any grid; resampled by nearest neighbour onto the test grid)."""

    tiles: TilePaths = Field(
        description="A glob, a folder, or a list of GeoTIFF paths (at most 1000 entries, of "
        "which at most 100 globs)."
    )
    classes: dict[int, LandCoverClass] = Field(
        max_length=1000,
        description="Class value -> name and group (non_vegetated, vegetated or excluded). "
        "Pixels of excluded classes, and of values not listed, leave every statistic.",
    )

    @field_validator("classes")
    @classmethod
    def _some_classes(cls, value: dict[int, LandCoverClass]) -> dict[int, LandCoverClass]:
        if not value:
            raise ValueError("list at least one land-cover class")
        return value


class Strata(Section):
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


class Outliers(Section):
    """The rule that flags blunders for the 'after outlier removal' statistics."""

    rule: OutlierRule = Field(
        default="nmad",
        description="'nmad': |dh - median| > factor x NMAD; 'rmse': |dh| > factor x RMSE.",
    )
    factor: float = Field(default=5.0, gt=0)


class Coregistration(Section):
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


class Recheck(Section):
    """When a nightly re-check flags a tile or region as regressed."""

    nmad_worse_fraction: float = Field(default=0.10, ge=0)
    nmad_worse_m: float = Field(default=0.05, ge=0)
    median_moved_m: float = Field(default=0.05, ge=0)


class ErrorModel(Section):
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


DerivedParameter = Literal[
    "slope", "aspect", "plan_curvature", "profile_curvature", "flow_direction"
]


class Derivatives(Section):
    """Opt-in comparison of derived terrain parameters of test and reference: slope, aspect,
    plan and profile curvature differences, D8 flow-direction agreement
    (workers/tile/derivatives.py). Costs more than the rest of the audit."""

    parameters: list[DerivedParameter] = Field(
        default=["slope", "aspect", "plan_curvature", "profile_curvature", "flow_direction"],
        min_length=1,
        description="Derived parameters to compare (flow_direction: D8 agreement).",
    )
    min_slope_deg: float = Field(
        default=5.0,
        ge=0,
        lt=90,
        description="Aspect and plan curvature are compared only where the reference slope "
        "exceeds this (degrees).",
    )

    @field_validator("parameters")
    @classmethod
    def _once_each(cls, value: list[str]) -> list[str]:
        if len(set(value)) != len(value):
            raise ValueError("name each derived parameter once")
        return value


TileStatistic = Literal["median", "nmad", "q95_abs", "rmse", "grade"]


class FigureOptions(Section):
    """Which figures to draw (workers/outputs/figures); changes no statistic."""

    tile_statistics: list[TileStatistic] = Field(
        default=["median", "nmad", "grade"],
        description="One tile map per statistic (grade: the finest ASPRS class "
        "each tile's RMSE meets, indicative); an empty list draws no tile map.",
    )

    @field_validator("tile_statistics")
    @classmethod
    def _once_each(cls, value: list[str]) -> list[str]:
        if len(set(value)) != len(value):
            raise ValueError("name each tile statistic once")
        return value
