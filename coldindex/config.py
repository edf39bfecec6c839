"""Configuration: a TOML file turned into frozen dataclasses, validated once.

The file has an ``[inputs]`` table of paths, one header-mapping table per input
(``[columns]`` for the casts, ``[ice_columns]``, ``[trajectory_columns]``), and
one table per command (``[index]``; later stages add theirs). Unknown keys and
wrong types are refused with a message naming the key and the allowed values.
Paths are resolved relative to the config file.
"""

from __future__ import annotations

import math
import sys
from collections.abc import Mapping
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any

from coldindex.errors import ConfigError

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

METHODS = ("kriging", "idw")
FAMILIES = ("exponential", "spherical", "matern", "gaussian")
VARIOGRAM_CHOICES = (*FAMILIES, "auto")
FIT_CHOICES = ("reml", "ml", "wls")  # the keys of coldindex.fitting.FIT_METHODS (test pins it)


@dataclass(frozen=True)
class IndexOptions:
    """Settings of the index computation (``coldindex index`` / ``[index]``).

    Attributes
    ----------
    thresholds
        Temperature thresholds for the cold-water areas. [°C]
    grid_km
        Side of the square equal-area grid cells. [km]
    sims
        Conditional simulations per year (0 = off).
    seed
        Base seed; each year draws from ``SeedSequence([seed, year])``.
    min_casts
        Fewest usable casts for a year to get indices.
    min_coverage
        Lowest share of the domain within 1.5 reference station spacings of a cast (the
        reference spacing is frozen with the domain).
    method
        ``kriging`` or ``idw``.
    variogram
        Variogram family or ``auto`` (chosen by the pooled likelihood of the yearly fits,
        or pooled cross-validation for ``wls``, then frozen).
    fit
        Variogram fit method: ``reml`` (restricted maximum likelihood, default), ``ml``
        or ``wls`` (least squares on the binned empirical variogram).
    param_draws
        Variogram parameter draws per year for the simulations (0 = plug-in only);
        the simulations are shared equally among the draws.
    per_year_family
        Opt-in: choose the family separately for every year.
    freeze_tolerance_c
        Freezing-point tolerance of the sensor below TEOS-10's freezing point. [°C]
    max_bottom_c
        Highest plausible bottom temperature. [°C]
    default_salinity
        Practical salinity used for the freezing point when a cast has none.
    outlier_z
        Spatial-outlier threshold on the size of a cast's leave-one-out standardized
        residual from the year's fit (0 = off); flagged casts are kept out of the refit.
    depth_zones
        Depth zones for ``regions.csv``, e.g. ``0-50,50-100,100-200`` [m] (needs the
        bathymetry); empty for none.
    timing_drift
        Opt in: the survey day (days from 1 January of the survey year, from each cast's
        date) as an external drift, alone or beside depth; the maps and indices are then
        predicted at ``reference_day``.
    reference_day
        The day the indices are adjusted to with ``timing_drift`` [day of the survey year];
        0 = the median survey day over all casts of the first run, then frozen.
    """

    thresholds: tuple[float, ...] = (2.0, 0.0)
    grid_km: float = 5.0
    sims: int = 200
    seed: int = 20261201
    min_casts: int = 30
    min_coverage: float = 0.75
    method: str = "kriging"
    variogram: str = "auto"
    fit: str = "reml"
    param_draws: int = 20
    per_year_family: bool = False
    freeze_tolerance_c: float = 0.2
    max_bottom_c: float = 20.0
    default_salinity: float = 34.0
    outlier_z: float = 4.0  # Common practice, no single source: |z| > 4 is rare under N(0,1)
    depth_zones: str = ""
    timing_drift: bool = False
    reference_day: float = 0.0

    def __post_init__(self) -> None:
        _check(len(self.thresholds) > 0, "index.thresholds", "at least one threshold", "[]")
        _check(len(self.thresholds) <= MAX_THRESHOLDS, "index.thresholds",
               f"at most {MAX_THRESHOLDS} thresholds (the cap on list lengths)",
               len(self.thresholds))
        _check(all(math.isfinite(t) and -5.0 <= t <= 40.0 for t in self.thresholds),
               "index.thresholds", "finite temperatures in -5..40 °C", self.thresholds)
        _check(0 <= self.seed < 2**63, "index.seed", "a whole number >= 0", self.seed)
        _check(len(set(self.thresholds)) == len(self.thresholds), "index.thresholds",
               "distinct values", self.thresholds)
        _check(1.0 <= self.grid_km <= 100.0, "index.grid_km", "a value in 1..100 km",
               self.grid_km)
        _check(0 <= self.sims <= 5000, "index.sims", "a whole number in 0..5000", self.sims)
        _check(self.min_casts >= 5, "index.min_casts", "at least 5", self.min_casts)
        _check(0.0 <= self.min_coverage <= 1.0, "index.min_coverage", "a share in 0..1",
               self.min_coverage)
        _check(self.method in METHODS, "index.method", f"one of {', '.join(METHODS)}",
               self.method)
        _check(self.fit in FIT_CHOICES, "index.fit", f"one of {', '.join(FIT_CHOICES)}",
               self.fit)
        _check(0 <= self.param_draws <= 200, "index.param_draws", "a whole number in 0..200",
               self.param_draws)
        _check(self.variogram in VARIOGRAM_CHOICES, "index.variogram",
               f"one of {', '.join(VARIOGRAM_CHOICES)}", self.variogram)
        _check(0.0 <= self.freeze_tolerance_c <= 2.0, "index.freeze_tolerance_c",
               "a value in 0..2 °C", self.freeze_tolerance_c)
        _check(0.0 < self.default_salinity <= 42.0, "index.default_salinity",
               "a practical salinity in 0..42", self.default_salinity)
        _check(self.outlier_z == 0.0 or 2.5 <= self.outlier_z <= 20.0, "index.outlier_z",
               "0 (off) or a value in 2.5..20", self.outlier_z)
        _check(not self.timing_drift or self.method == "kriging", "index.timing_drift",
               "false with method idw (a drift needs kriging)", self.timing_drift)
        _check(-92.0 <= self.reference_day <= 458.0, "index.reference_day",
               "a day of the survey year in -92..458 (0 = median survey day, frozen)",
               self.reference_day)
        if self.depth_zones:
            from coldindex.errors import InputError
            from coldindex.regions import parse_depth_zones

            try:
                parse_depth_zones(self.depth_zones, "index.depth_zones")
            except InputError as exc:
                raise ConfigError(str(exc)) from None


@dataclass(frozen=True)
class ClassifyConfig:
    """``[classify]``: the columns classified each year and the cut-value rule."""

    columns: tuple[str, ...] = ("bottom_mean_c", "below_2c_km2")
    rule: str = "tercile"
    reference: str = ""

    def __post_init__(self) -> None:
        _check(len(self.columns) > 0, "classify.columns", "at least one column", self.columns)
        _check(self.rule == "tercile" or self.rule.startswith("sd:"), "classify.rule",
               "tercile or sd:K", self.rule)


@dataclass(frozen=True)
class ShiftsConfig:
    """``[shifts]``: regime-shift settings (see ``coldindex shifts``)."""

    column: str = "bottom_mean_c"
    method: str = "both"
    cutoff: int = 10
    alpha: float = 0.1
    huber: float = 1.0
    prewhiten: str = "none"
    min_size: int = 5
    boot: int = 999
    seed: int = 20261201
    p_max: float = 0.05

    def __post_init__(self) -> None:
        _check(0 < self.alpha < 1, "shifts.alpha", "a value in (0, 1) (STARS' detection level)",
               self.alpha)
        _check(0 < self.p_max < 1, "shifts.p_max", "a value in (0, 1) (the largest p-value "
               "for a shift to survive)", self.p_max)
        _check(self.method in ("stars", "pelt", "both"), "shifts.method",
               "one of stars, pelt, both", self.method)
        _check(self.prewhiten in ("none", "ip4", "mpk"), "shifts.prewhiten",
               "one of none, ip4, mpk", self.prewhiten)
        _check(self.boot >= 0, "shifts.boot", "a whole number >= 0", self.boot)
        _check(0 <= self.seed < 2**63, "shifts.seed", "a whole number >= 0", self.seed)


@dataclass(frozen=True)
class SkillConfig:
    """``[skill]``: ice-skill settings (see ``coldindex skill``)."""

    column: str = "bottom_mean_c"
    months: str = "11-4"
    survey_month: int = 0
    winter: str = "mean"
    lags: str = "0-2"
    confidence: float = 0.9
    leave_out: int = 3
    outlook_lag: int = -1
    outlook_q_max: float = 0.1

    def __post_init__(self) -> None:
        _check(self.outlook_lag >= -1, "skill.outlook_lag",
               "a lag from skill.lags (or -1: chosen inside the hindcast folds)",
               self.outlook_lag)
        _check(0 < self.outlook_q_max <= 1, "skill.outlook_q_max", "a value in (0, 1]",
               self.outlook_q_max)
        _check(0 <= self.survey_month <= 12, "skill.survey_month",
               "a month in 1..12 (or 0: the month of the target's median survey day)",
               self.survey_month)
        _check(self.winter in ("mean", "max"), "skill.winter", "mean or max", self.winter)
        _check(0 < self.confidence < 1, "skill.confidence", "a value in (0, 1)",
               self.confidence)
        _check(self.leave_out >= 1 and self.leave_out % 2 == 1, "skill.leave_out",
               "an odd whole number >= 1", self.leave_out)


@dataclass(frozen=True)
class ProjectConfig:
    """``[project]``: projection settings (see ``coldindex project``)."""

    column: str = "bottom_mean_c"
    adjust: str = "qdm"
    calibration: str = ""
    window: int = 10
    p_stop: float = 0.1
    units: str = "degC"
    short_calibration: bool = False

    def __post_init__(self) -> None:
        _check(not self.short_calibration or bool(self.calibration),
               "project.short_calibration", "false unless project.calibration is given",
               self.short_calibration)
        _check(self.adjust in ("none", "delta", "qmap", "qdm"), "project.adjust",
               "one of none, delta, qmap, qdm", self.adjust)
        _check(self.window >= 1, "project.window", "a whole number >= 1", self.window)
        _check(0 < self.p_stop < 1, "project.p_stop", "a value in (0, 1)", self.p_stop)


@dataclass(frozen=True)
class CovariatesConfig:
    """``[covariates]``: the assessor's covariate table."""

    columns: tuple[str, ...] = ("bottom_mean_c", "below_2c_km2", "below_0c_km2")
    lags: tuple[int, ...] = (1,)
    reference: str = ""

    def __post_init__(self) -> None:
        _check(all(1 <= lag <= MAX_LAG_SPAN for lag in self.lags), "covariates.lags",
               f"whole numbers in 1..{MAX_LAG_SPAN} (the cap on lags)", self.lags)
        _check(len(set(self.lags)) == len(self.lags), "covariates.lags", "distinct values",
               self.lags)


@dataclass(frozen=True)
class ReportConfig:
    """``[report]``: figures and the HTML page."""

    map_years: int = 4
    title: str = "Bottom-temperature indicators"
    tolerance: float = 1e-6

    def __post_init__(self) -> None:
        _check(1 <= self.map_years <= 12, "report.map_years", "a whole number in 1..12",
               self.map_years)
        _check(0.0 <= self.tolerance < 1.0, "report.tolerance",
               "a relative change in 0..1 (0 = any change counts)", self.tolerance)


@dataclass(frozen=True)
class ProfileOptions:
    """``[profiles]``: profiles to bottom values (see :mod:`coldindex.profiles`).

    Attributes
    ----------
    max_gap_m
        Largest distance between the deepest good sample and the sea floor for the
        cast to give a bottom value. [m] The default of 10 m keeps a CTD stopped a
        few metres above the floor (the usual practice, to protect the instrument)
        and a trawl-mounted logger, and refuses a cast that stopped in the water column.
    average_m
        Average the good samples within this distance of the deepest one (0 = the
        deepest sample alone). [m]
    min_c, max_c
        Plausible temperature range. [°C]
    min_salinity, max_salinity
        Plausible practical salinity range.
    max_depth_m
        Deepest plausible sample. [m]
    spike_c
        Spike-test threshold above 500 dbar. [°C]
    spike_deep_c
        Spike-test threshold at 500 dbar and deeper. [°C]
    """

    max_gap_m: float = 10.0
    average_m: float = 0.0
    min_c: float = -2.5  # Source: Wong et al. 2020, Argo QC manual v3.3, test 6 (global range)
    max_c: float = 40.0  # Source: Wong et al. 2020, Argo QC manual v3.3, test 6 (global range)
    min_salinity: float = 2.0  # Source: Wong et al. 2020, Argo QC manual v3.3, test 6
    max_salinity: float = 41.0  # Source: Wong et al. 2020, Argo QC manual v3.3, test 6
    max_depth_m: float = 11000.0  # Common practice, no single source: the deepest ocean
    spike_c: float = 6.0  # Source: Wong et al. 2020, Argo QC manual v3.3, test 9 (p < 500 dbar)
    spike_deep_c: float = 2.0  # Source: Wong et al. 2020, Argo QC manual v3.3, test 9

    def __post_init__(self) -> None:
        _check(0.0 <= self.max_gap_m <= 1000.0, "profiles.max_gap_m", "a distance in 0..1000 m",
               self.max_gap_m)
        _check(0.0 <= self.average_m <= 100.0, "profiles.average_m", "a distance in 0..100 m",
               self.average_m)
        _check(self.min_c < self.max_c, "profiles.min_c", "below profiles.max_c", self.min_c)
        _check(self.min_salinity < self.max_salinity, "profiles.min_salinity",
               "below profiles.max_salinity", self.min_salinity)
        _check(self.max_depth_m > 0, "profiles.max_depth_m", "a depth > 0 m", self.max_depth_m)
        _check(self.spike_c > 0 and self.spike_deep_c > 0, "profiles.spike_c",
               "thresholds > 0 °C (spike_c and spike_deep_c)", (self.spike_c, self.spike_deep_c))


ICE_QUANTITIES = ("area_km2", "extent_km2", "volume_km3", "mass_gt")


@dataclass(frozen=True)
class IceFieldsOptions:
    """``[ice_fields]``: gridded ice to the monthly series (see :mod:`coldindex.icefields`).

    Attributes
    ----------
    density_kg_m3
        Sea-ice density for the mass. [kg m-3] Default 917, the pure-ice density that
        sea-ice models such as CICE use; measured first-year sea ice lies near 900-920
        below the waterline.
    extent_threshold
        Concentration from which a cell counts toward the extent (fraction). The
        usual convention is 15 %.
    thickness
        How to read ``sea_ice_thickness``: ``auto`` (from its ``cell_methods``:
        ``area: mean where sea_ice`` is floe thickness, multiplied by concentration;
        ``area: mean where sea`` is already per cell area), ``floe`` or ``cell``.
    quantity
        The series the skill stage reads: one of area_km2, extent_km2, volume_km3, mass_gt.
    region
        The region whose series the skill stage reads (empty: the only region).
    """

    density_kg_m3: float = 917.0  # From memory: CICE's rhoi (Hunke et al., CICE documentation)
    extent_threshold: float = 0.15  # Common practice, no single source (passive-microwave extent)
    thickness: str = "auto"
    quantity: str = "mass_gt"
    region: str = ""

    def __post_init__(self) -> None:
        _check(500.0 <= self.density_kg_m3 <= 1000.0, "ice_fields.density_kg_m3",
               "a density in 500..1000 kg m-3", self.density_kg_m3)
        _check(0.0 < self.extent_threshold <= 1.0, "ice_fields.extent_threshold",
               "a concentration fraction in (0, 1] (15 % is 0.15)", self.extent_threshold)
        _check(self.thickness in ("auto", "floe", "cell"), "ice_fields.thickness",
               "one of auto, floe, cell", self.thickness)
        _check(self.quantity in ICE_QUANTITIES, "ice_fields.quantity",
               f"one of {', '.join(ICE_QUANTITIES)}", self.quantity)


@dataclass(frozen=True)
class Inputs:
    """Input paths (``[inputs]``), resolved relative to the config file."""

    casts: Path | None = None
    domain: Path | None = None
    bathymetry: Path | None = None
    ice: Path | None = None
    trajectories: tuple[Path, ...] = ()
    coastline: Path | None = None
    regions: Path | None = None
    profiles: Path | None = None
    ice_fields: tuple[Path, ...] = ()
    ice_regions: Path | None = None


@dataclass(frozen=True)
class Config:
    """A whole validated configuration."""

    inputs: Inputs = field(default_factory=Inputs)
    columns: Mapping[str, str] = field(default_factory=dict)
    ice_columns: Mapping[str, str] = field(default_factory=dict)
    trajectory_columns: Mapping[str, str] = field(default_factory=dict)
    index: IndexOptions = field(default_factory=IndexOptions)
    classify: ClassifyConfig = field(default_factory=ClassifyConfig)
    shifts: ShiftsConfig = field(default_factory=ShiftsConfig)
    skill: SkillConfig = field(default_factory=SkillConfig)
    project: ProjectConfig = field(default_factory=ProjectConfig)
    covariates: CovariatesConfig = field(default_factory=CovariatesConfig)
    report: ReportConfig = field(default_factory=ReportConfig)
    profile_columns: Mapping[str, str] = field(default_factory=dict)
    profiles: ProfileOptions = field(default_factory=ProfileOptions)
    ice_fields: IceFieldsOptions = field(default_factory=IceFieldsOptions)
    source: Path | None = None


_STAGE_TABLES: dict[str, type] = {"index": IndexOptions, "classify": ClassifyConfig,
                                   "shifts": ShiftsConfig, "skill": SkillConfig,
                                   "project": ProjectConfig, "covariates": CovariatesConfig,
                                   "report": ReportConfig, "profiles": ProfileOptions,
                                   "ice_fields": IceFieldsOptions}


def _check(ok: bool, key: str, expected: str, got: object) -> None:
    if not ok:
        raise ConfigError(f"{key} needs to be {expected}, got: {got!r}.")


MAX_THRESHOLDS = 12  # cap on the thresholds of one run (each adds maps to fields.nc)
MAX_LAG_SPAN = 10  # cap on the span of skill lags and on covariate lags [years]


def check_months(months: list[int], key: str) -> list[int]:
    """Refuse winter months outside 1..12 or repeated; return them unchanged."""
    _check(bool(months) and all(1 <= m <= 12 for m in months), key, "months in 1..12", months)
    _check(len(set(months)) == len(months), key, "months without repeats", months)
    return months


def check_lags(lags: list[int], key: str) -> list[int]:
    """Refuse lags below 0 or spanning more than :data:`MAX_LAG_SPAN` years."""
    _check(bool(lags) and min(lags) >= 0, key, "whole years >= 0", lags)
    _check(max(lags) - min(lags) <= MAX_LAG_SPAN, key,
           f"lags spanning at most {MAX_LAG_SPAN} years (the cap on lags)",
           f"{min(lags)}-{max(lags)}")
    _check(max(lags) <= 5 * MAX_LAG_SPAN, key, f"lags of at most {5 * MAX_LAG_SPAN} years",
           max(lags))
    return lags


def _coerce(key: str, value: Any, default: Any) -> Any:
    """Coerce a TOML value to the type of the dataclass default, or refuse it."""
    if isinstance(default, bool):
        _check(isinstance(value, bool), key, "true or false", value)
        return value
    if isinstance(default, int):
        _check(isinstance(value, int) and not isinstance(value, bool), key, "a whole number",
               value)
        return value
    if isinstance(default, float):
        _check(isinstance(value, (int, float)) and not isinstance(value, bool)
               and math.isfinite(value), key, "a finite number", value)
        return float(value)
    if isinstance(default, str):
        _check(isinstance(value, str), key, "a string", value)
        return value
    if isinstance(default, tuple):
        _check(isinstance(value, list), key, "a list", value)
        kind = type(default[0]) if default else float
        ok = all(isinstance(v, str) for v in value) if kind is str else all(
            isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)
            and (kind is not int or float(v).is_integer()) for v in value)
        _check(ok, key, f"a list of {'names' if kind is str else 'numbers'}", value)
        return tuple(kind(v) for v in value)
    return value  # pragma: no cover


def options_from_mapping(cls: type, table: Mapping[str, Any], where: str) -> Any:
    """Build a stage's options dataclass from a mapping, refusing unknown keys.

    Parameters
    ----------
    cls
        The dataclass (e.g. :class:`IndexOptions`).
    table
        Key/value pairs, e.g. the ``[index]`` table of a config.
    where
        Table name used in messages.

    Returns
    -------
    object
        The validated options.
    """
    defaults = cls()
    allowed = {f.name for f in fields(cls)}
    kwargs: dict[str, Any] = {}
    for key, value in table.items():
        if key not in allowed:
            raise ConfigError(f"{where}.{key} is not a known key; allowed keys: "
                              f"{', '.join(sorted(allowed))}.")
        kwargs[key] = _coerce(f"{where}.{key}", value, getattr(defaults, key))
    return cls(**kwargs)


def index_options_from_mapping(table: Mapping[str, Any], where: str = "index") -> IndexOptions:
    """Build :class:`IndexOptions` from a mapping (see :func:`options_from_mapping`)."""
    result: IndexOptions = options_from_mapping(IndexOptions, table, where)
    return result


def parse_column_map(text: str | None, option: str = "--columns") -> dict[str, str]:
    """Parse ``ours=theirs,ours=theirs`` into ``{ours: theirs}``.

    Parameters
    ----------
    text
        The option value, or None.
    option
        Option name used in messages.

    Returns
    -------
    dict
        Mapping from our column name to the header in the user's file.
    """
    if not text:
        return {}
    out: dict[str, str] = {}
    for part in text.split(","):
        if not part.strip():
            continue
        if "=" not in part:
            raise ConfigError(f"{option} needs pairs ours=theirs separated by commas, got: "
                              f"{part.strip()!r}.")
        ours, theirs = (s.strip() for s in part.split("=", 1))
        if not ours or not theirs:
            raise ConfigError(f"{option} needs pairs ours=theirs with both names, got: "
                              f"{part.strip()!r}.")
        out[ours] = theirs
    return out


def _string_map(table: Any, key: str) -> dict[str, str]:
    _check(isinstance(table, dict), key, "a table of ours = \"theirs\" pairs", table)
    for k, v in table.items():
        _check(isinstance(v, str), f"{key}.{k}", "a header name (string)", v)
    return dict(table)


def load_config(path: Path) -> Config:
    """Read and validate a TOML configuration file.

    Parameters
    ----------
    path
        The TOML file.

    Returns
    -------
    Config
        The validated configuration, paths resolved relative to the file.
    """
    if path.is_dir():
        raise ConfigError(f"Config file {path} is a folder; give the path of a TOML file.")
    try:
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise ConfigError(f"Config file {path} does not exist; give the path of a TOML "
                          "file.") from None
    except OSError as exc:
        from coldindex.errors import os_error_sentence

        raise ConfigError(os_error_sentence(exc, "reading the config file", path)) from None
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise ConfigError(f"Config file {path} is not valid TOML ({exc}); fix the syntax "
                          "at that place.") from None
    return config_from_mapping(raw, base=path.parent, source=path)


def config_from_mapping(raw: Mapping[str, Any], base: Path, source: Path | None = None
                        ) -> Config:
    """Validate a parsed config mapping; see :func:`load_config`."""
    known = {"inputs", "columns", "ice_columns", "trajectory_columns", "profile_columns",
             *_STAGE_TABLES}
    for key in raw:
        if key not in known:
            raise ConfigError(f"[{key}] is not a known table; allowed tables: "
                              f"{', '.join(sorted(known))}.")
    inputs_raw = raw.get("inputs", {})
    _check(isinstance(inputs_raw, dict), "inputs", "a table", inputs_raw)
    input_keys = {f.name for f in fields(Inputs)}
    paths: dict[str, Any] = {}
    for key, value in inputs_raw.items():
        if key not in input_keys:
            raise ConfigError(f"inputs.{key} is not a known key; allowed keys: "
                              f"{', '.join(sorted(input_keys))}.")
        if key in ("trajectories", "ice_fields"):
            items = value if isinstance(value, list) else [value]
            _check(all(isinstance(v, str) for v in items), f"inputs.{key}",
                   "a path or a list of paths", value)
            paths[key] = tuple((base / v) for v in items)
        else:
            _check(isinstance(value, str), f"inputs.{key}", "a path (string)", value)
            paths[key] = base / value
    stages = {}
    for key, cls in _STAGE_TABLES.items():
        _check(isinstance(raw.get(key, {}), dict), key, "a table", raw.get(key))
        stages[key] = options_from_mapping(cls, raw.get(key, {}), key)
    return Config(
        inputs=Inputs(**paths),
        columns=_string_map(raw.get("columns", {}), "columns"),
        ice_columns=_string_map(raw.get("ice_columns", {}), "ice_columns"),
        trajectory_columns=_string_map(raw.get("trajectory_columns", {}),
                                       "trajectory_columns"),
        profile_columns=_string_map(raw.get("profile_columns", {}), "profile_columns"),
        source=source, **stages,
    )


TEMPLATE = """# coldindex configuration: one file drives `coldindex update`.
# Paths are relative to this file. Every key is optional except inputs.casts (or, instead of
# it, inputs.profiles).

[inputs]
casts = "casts.csv"                  # CSV or Parquet: year, lat, lon, bottom_c, ...
domain = "domain.geojson"            # optional: without it a domain is derived and frozen
bathymetry = "bathymetry.nc"         # optional: depth as external drift for kriging
ice = "ice.csv"                      # optional: monthly ice (year, month, ice) for the skill stage
# profiles = "profiles.nc"           # instead of casts: CTD profiles (CF NetCDF or CSV/Parquet)
# ice_fields = ["ice_fields.nc"]     # instead of ice: gridded ice concentration (and thickness)
# ice_regions = "regions.geojson"    # regions of the ice series (default: the domain)
trajectories = ["trajectories.csv"]  # optional: model trajectories for the projection stage
# regions = "strata.geojson"         # optional: named regions (no overlaps) -> regions.csv
# coastline = "coast.geojson"        # optional: coastline lines or polygons drawn on the maps

[columns]
# Map your casts headers to ours: ours = "theirs", e.g. bottom_c = "TempBottom"

[ice_columns]
# year = "Yr", month = "Mon", ice = "IceMass"

[trajectory_columns]
# model = "GCM", value = "tob"

[profile_columns]
# cast = "CastID", temperature_c = "TEMP", pressure_dbar = "PRES"

[profiles]
max_gap_m = 10.0          # deepest good sample at most this far above the sea floor, m
average_m = 0.0           # average the good samples this far above the deepest (0 = off), m

[ice_fields]
density_kg_m3 = 917.0     # sea-ice density for the mass
extent_threshold = 0.15   # concentration from which a cell counts toward the extent
thickness = "auto"        # auto (from cell_methods), floe or cell
quantity = "mass_gt"      # series for the skill stage: area_km2, extent_km2, volume_km3, mass_gt
region = ""               # region of that series (empty: the only region)

[index]
thresholds = [2.0, 0.0]   # degC
grid_km = 5.0             # equal-area grid cell side, km
sims = 200                # conditional simulations a year (0 = off)
seed = 20261201           # each year draws from SeedSequence([seed, year])
min_casts = 30
min_coverage = 0.75       # share of the domain within 1.5 reference station spacings of a cast
method = "kriging"        # kriging or idw
variogram = "auto"        # exponential, spherical, matern, gaussian, or auto (then frozen)
fit = "reml"              # variogram fit: reml, ml or wls
param_draws = 20          # variogram parameter draws a year for the simulations (0 = off)
outlier_z = 4.0           # spatial-outlier threshold on the leave-one-out |z| (0 = off)
depth_zones = ""          # e.g. "0-50,50-100,100-200" (m, from the bathymetry) -> regions.csv
timing_drift = false      # survey day as an external drift; indices at reference_day
reference_day = 0.0       # day of the survey year (0 = median survey day, then frozen)

[classify]
columns = ["bottom_mean_c", "below_2c_km2"]
rule = "tercile"          # tercile or sd:K
reference = ""            # A-B, empty = whole record

[shifts]
column = "bottom_mean_c"
method = "both"           # stars, pelt or both
cutoff = 10               # STARS cut-off length; a shift in the last cutoff years is provisional
alpha = 0.1               # STARS' own detection level
p_max = 0.05              # a shift survives the red-noise test when its p-value is below this
boot = 999

[skill]
column = "bottom_mean_c"
months = "11-4"           # winter months in order; a span may wrap over the new year
survey_month = 0          # month the survey starts, 1..12; 0 = month of the median survey day
# A winter is labelled with the year of the first survey that starts after its last month;
# lag 0 pairs it with that survey (July survey, months 11-4: Nov-Dec of Y -> winter Y+1;
# January survey, months 5-10: May-Oct of Y -> winter Y+1).
winter = "mean"           # mean or max
lags = "0-2"              # the hindcast and outlook choose predictor and lag among these
leave_out = 3
outlook_lag = -1          # -1: chosen inside the hindcast folds; or one lag of skill.lags
outlook_q_max = 0.1       # above this q-value (or without skill) the outlook is climatological

[project]
column = "bottom_mean_c"
adjust = "qdm"            # none, delta, qmap, qdm
calibration = ""          # A-B, empty = overlap of model and observed years (>= 20 years)
short_calibration = false # true accepts fewer than 20 years with an explicit calibration
window = 10
p_stop = 0.1
units = "degC"

[covariates]
columns = ["bottom_mean_c", "below_2c_km2", "below_0c_km2"]
lags = [1]
reference = ""

[report]
map_years = 4
title = "Bottom-temperature indicators"
tolerance = 1e-6          # relative change that counts as a revision
"""
