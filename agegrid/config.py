"""The TOML build file: schema, defaults, paths relative to the file, and precise errors.

Every key is declared below with its default; an unknown key, a wrong type or an impossible value
raises :class:`~agegrid.errors.BadInput` naming the file and the dotted key, with the nearest valid
key suggested for a misspelling.
"""
from __future__ import annotations

import difflib
import re
import tomllib
from pathlib import Path
from typing import Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from agegrid.errors import BadInput

class Section(BaseModel):
    """A table of the build file: unknown keys are refused."""

    model_config = ConfigDict(extra="forbid", frozen=True)


class Inputs(Section):
    """``[inputs]``: the files a build reads, relative to the build file."""

    picks: Path
    ridges: Path
    isochrons: Path | None = None
    barriers: Path | None = None
    domain: Path | None = None
    bathymetry: Path | None = None
    sediment: Path | None = None
    magnetic_grid: Path | None = None
    magnetic_profiles: Path | None = None


class Grid(Section):
    """``[grid]``: region (west, east, south, north), spacing in CRS units, CRS, block size."""

    region: tuple[float, float, float, float]
    spacing: float
    crs: str = "EPSG:4326"
    chunk: int = Field(512, ge=16, le=8192)

    @field_validator("spacing")
    @classmethod
    def _positive(cls, value):
        if not value > 0:
            raise ValueError(f"must be a positive number, got {value}")
        return value

    @field_validator("crs")
    @classmethod
    def _known_crs(cls, value):
        import pyproj

        try:
            pyproj.CRS.from_user_input(value)
        except pyproj.exceptions.CRSError as exc:
            raise ValueError(f"unknown CRS {value!r}: {exc}") from None
        return value

    @model_validator(mode="after")
    def _geographic_limits(self):
        import pyproj

        if pyproj.CRS.from_user_input(self.crs).is_geographic:
            west, east, south, north = self.region
            if south < -90 or north > 90:
                raise ValueError(f"region latitudes must lie in [-90, 90], got {south}..{north}")
            if east - west > 360 + 1e-9:
                raise ValueError(f"region spans {east - west} degrees of longitude, more than 360")
        return self

    @field_validator("region")
    @classmethod
    def _ordered(cls, value):
        west, east, south, north = value
        if not west < east:
            raise ValueError(f"west ({west}) must be less than east ({east}); "
                             "write a region across the antimeridian with east past 180")
        if not south < north:
            raise ValueError(f"south ({south}) must be less than north ({north})")
        return value


class Age(Section):
    """``[age]``: timescale and the age engine's settings."""

    timescale: str = "CK95"
    max_extrapolation_myr: float = Field(5.0, ge=0)
    pick_sigma_km: float = Field(2.0, gt=0)
    timescale_sigma_percent: float = Field(1.0, ge=0)
    extend_barriers: bool = True
    implied_fracture_zones: bool = True


class Picks(Section):
    """``[picks]``: what the pick QA does with suspect picks, and the bounds it applies."""

    suspect: Literal["keep", "drop", "fail"] = "keep"
    max_half_rate_mm_yr: float = Field(100.0, gt=0)
    min_half_rate_mm_yr: float = Field(2.0, ge=0)
    duplicate_km: float = Field(0.5, ge=0)


class Kinematics(Section):
    """``[kinematics]``: the age bands of the per-segment rate table."""

    age_band_myr: float = Field(2.0, gt=0)


class Depth(Section):
    """``[depth]``: cooling models, how to read the bathymetry, binning and the fit."""

    models: list[str] = ["gdh1"]
    bathymetry_sign: Literal["auto", "depth", "elevation"] = "auto"
    age_bin_myr: float = Field(5.0, gt=0)
    fit_age_range: tuple[float, float] = (0.0, 70.0)
    isotherm_c: float | None = None
    parameters: dict[str, dict[str, float]] = {}

    @field_validator("models")
    @classmethod
    def _known_models(cls, value):
        from agegrid.thermal import MODELS

        for name in value:
            if name not in MODELS:
                close = difflib.get_close_matches(name, list(MODELS), n=1)
                hint = f" (did you mean {close[0]!r}?)" if close else ""
                raise ValueError(f"unknown model {name!r}{hint}; known: {', '.join(MODELS)}")
        return value

    @model_validator(mode="after")
    def _known_parameters(self):
        from agegrid.thermal import MODELS

        for name, params in self.parameters.items():
            if name not in MODELS:
                raise ValueError(f"parameters given for unknown model {name!r}")
            MODELS[name].check_overrides(params)
        return self


class Sediment(Section):
    """``[sediment]``: compaction parameters for the unloading correction."""

    lithology: str = "deep_sea"
    surface_porosity: float | None = Field(None, gt=0, lt=1)
    compaction_per_km: float | None = Field(None, gt=0)
    grain_density: float | None = Field(None, gt=1000)

    @field_validator("lithology")
    @classmethod
    def _known_lithology(cls, value):
        from agegrid.sediment import LITHOLOGIES

        if value not in LITHOLOGIES:
            raise ValueError(f"unknown lithology {value!r}; known: {', '.join(LITHOLOGIES)}")
        return value


class Magnetic(Section):
    """``[magnetic]``: the magnetised layer and the ambient field."""

    layer_thickness_km: float = Field(0.5, gt=0)
    magnetisation: float = 5.0
    epoch: float | None = Field(2020.0, ge=1900, le=2035)
    field_inclination: float | None = Field(None, ge=-90, le=90)
    field_declination: float | None = Field(None, ge=-360, le=360)
    tolerance_km: float = Field(5.0, gt=0)
    window_km: float = Field(40.0, gt=0)
    max_lag_km: float = Field(25.0, gt=0)
    min_correlation: float = Field(0.5, ge=-1, le=1)

    @model_validator(mode="after")
    def _field_given_once(self):
        if (self.field_inclination is None) != (self.field_declination is None):
            raise ValueError("give field_inclination and field_declination together (or neither, for the IGRF)")
        return self


class Output(Section):
    """``[output]``: where outputs go and in which formats."""

    directory: Path = Path("out")
    formats: list[Literal["netcdf", "geotiff", "zarr"]] = ["netcdf", "geotiff"]
    report: bool = True
    cog_compression: Literal["deflate", "zstd", "none"] = "deflate"
    cog_predictor: bool = False
    netcdf_shares_cog_tiles: bool = True

    @model_validator(mode="after")
    def _predictor_needs_a_codec(self):
        if self.cog_predictor and self.cog_compression == "none":
            raise ValueError("cog_predictor only works with a codec: set cog_compression to 'deflate' or 'zstd'")
        return self


class BuildConfig(Section):
    """A whole build file, with every path made absolute."""

    name: str
    inputs: Inputs
    grid: Grid
    age: Age = Age()
    picks: Picks = Picks()
    kinematics: Kinematics = Kinematics()
    depth: Depth = Depth()
    sediment: Sediment = Sediment()
    magnetic: Magnetic = Magnetic()
    output: Output = Output()
    source: Path | None = None

    @field_validator("name")
    @classmethod
    def _file_stem(cls, value):
        if not re.fullmatch(r"[A-Za-z0-9][A-Za-z0-9_.-]*", value):
            raise ValueError("must be a file stem: letters, digits, '_', '.', '-'")
        return value


def _section_at(loc: tuple) -> type[BaseModel] | None:
    """The model class that holds the key at ``loc`` (for suggesting names)."""
    model: type[BaseModel] | None = BuildConfig
    for part in loc[:-1]:
        field = model.model_fields.get(part) if model else None
        annotation = getattr(field, "annotation", None)
        model = annotation if isinstance(annotation, type) and issubclass(annotation, BaseModel) else None
    return model


def _explain(error: dict) -> tuple[str, str]:
    loc = tuple(str(p) for p in error["loc"])
    key = ".".join(loc)
    if error["type"] == "extra_forbidden":
        model = _section_at(loc)
        known = [k for k in (model.model_fields if model else {}) if k != "source"]
        close = difflib.get_close_matches(loc[-1], known, n=1, cutoff=0.5)
        hint = f"; did you mean {close[0]!r}?" if close else ""
        return key, f"unknown key{hint} (valid here: {', '.join(known)})"
    if error["type"] == "missing":
        return key, "required key is missing"
    msg = error["msg"].removeprefix("Value error, ")
    return key, f"{msg} (got {error.get('input')!r})" if error["type"] != "value_error" else msg


def load_build_file(path: str | Path) -> BuildConfig:
    """Read, validate and resolve a build file.

    Parameters
    ----------
    path : str or Path
        The TOML build file.

    Returns
    -------
    BuildConfig
        Validated settings; input and output paths are absolute.

    Raises
    ------
    BadInput
        The file is missing, is not TOML, or a key is unknown, mistyped or impossible.
    """
    path = Path(path)
    try:
        raw = tomllib.loads(path.read_bytes().decode("utf-8"))
    except FileNotFoundError:
        raise BadInput("build file not found", path) from None
    except IsADirectoryError:
        raise BadInput("is a directory, not a build file", path) from None
    except UnicodeDecodeError as exc:
        raise BadInput(f"not UTF-8 text (byte {exc.start})", path) from None
    except tomllib.TOMLDecodeError as exc:
        raise BadInput(f"broken TOML: {exc}", path) from None
    try:
        config = BuildConfig.model_validate(raw)
    except ValidationError as exc:
        errors = sorted(exc.errors(), key=lambda e: {"extra_forbidden": 0, "missing": 2}.get(e["type"], 1))
        key, what = _explain(errors[0])
        raise BadInput(what, path, key) from None
    return resolve_paths(config, path)


def resolve_paths(config: BuildConfig, path: Path) -> BuildConfig:
    """Make input and output paths absolute against the build file's folder and check inputs exist."""
    base = path.resolve().parent
    inputs = {}
    for key, value in config.inputs:
        if value is None:
            continue
        full = (base / value).resolve()
        if not full.is_file():
            raise BadInput(f"input file not found: {full}", path, f"inputs.{key}")
        inputs[key] = full
    age = config.age
    if age.timescale.lower().endswith(".csv"):
        table = (base / age.timescale).resolve()
        if not table.is_file():
            raise BadInput(f"timescale table not found: {table}", path, "age.timescale")
        age = age.model_copy(update={"timescale": str(table)})
    else:
        from agegrid.timescale import BUNDLED

        if age.timescale.upper() not in BUNDLED:
            close = difflib.get_close_matches(age.timescale.upper(), list(BUNDLED), n=1)
            hint = f" (did you mean {close[0]!r}?)" if close else ""
            raise BadInput(f"unknown timescale {age.timescale!r}{hint}; bundled: "
                           f"{', '.join(BUNDLED)}, or give a CSV path", path, "age.timescale")
    output = config.output.model_copy(update={"directory": (base / config.output.directory).resolve()})
    return config.model_copy(update={
        "inputs": config.inputs.model_copy(update=inputs), "age": age, "output": output,
        "source": path.resolve()})
