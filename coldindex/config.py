"""Every option of every stage, with its default, validated once before any work.

One pydantic model a table: ``[index]``, ``[classify]``, ``[shifts]``, ``[skill]``,
``[project]``, ``[covariates]``, ``[report]``, ``[profiles]``, ``[ice_fields]`` and
``[read]``, plus ``[inputs]`` (paths, relative to the config file) and one
header-mapping table per input. The same models serve the single commands: a flag
is its key with ``-`` for ``_`` (:func:`option_name`), so an error names the config
key inside ``coldindex update`` and the flag on a command, and quotes the user's
value as given. Texts that need parsing (lags, months, periods, rules, zones) are
parsed here, when the options are read; computation modules receive parsed values.

Defaults live here and nowhere else; published ones carry their source.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from pathlib import Path
from typing import Any, ClassVar

from pydantic import BaseModel, ConfigDict, Field, ValidationError, model_validator

from coldindex.errors import ConfigError, key_naming

# Registries by name: one entry a choice, with the sentence that explains it. Choices,
# help texts and docs derive from these; the implementing modules keep one function a
# name, and tests/test_config.py pins that both lists agree.
FAMILIES: dict[str, str] = {
    "exponential": "exponential covariance (Matérn ν = 1/2): rough fields",
    "spherical": "spherical covariance: zero beyond the range",
    "matern": "Matérn ν = 3/2: once-differentiable fields",
    "gaussian": "Gaussian covariance: very smooth fields",
}
FITS: dict[str, str] = {
    "reml": "restricted maximum likelihood (default)",
    "ml": "maximum likelihood",
    "wls": "least squares on the binned variogram, bins weighted by pair counts",
}
ADJUSTMENTS: dict[str, str] = {
    "none": "no bias adjustment",
    "delta": "shift by the calibration-period mean difference",
    "qmap": "empirical quantile mapping",
    "qdm": "quantile delta mapping (Cannon et al. 2015), keeps the model's trend",
}
DETECTORS: dict[str, str] = {
    "stars": "sequential t-test (STARS)",
    "pelt": "penalised exact segmentation (PELT objective)",
}
METHODS = ("kriging", "idw")
VARIOGRAM_CHOICES = (*FAMILIES, "auto")
ICE_QUANTITIES = ("area_km2", "extent_km2", "volume_km3", "mass_gt")
MAX_THRESHOLDS = 12  # cap on the thresholds of one run (each adds maps to fields.nc)
MAX_LAG_SPAN = 10  # cap on the span of skill lags and on covariate lags [years]

# Flags whose name is not simply the key with "-" for "_"; one mapping, both ways.
_FLAGS: dict[tuple[str, str], str] = {
    ("shifts", "column"): "--value", ("skill", "column"): "--value",
    ("project", "column"): "--value", ("classify", "columns"): "--value",
    ("ice_fields", "quantity"): "--ice-quantity", ("ice_fields", "region"): "--ice-region",
    ("inputs", "casts"): "CASTS", ("", "columns"): "--columns",
}


def option_name(table: str, key: str, *, flag: bool) -> str:
    """The name a user knows an option by: ``table.key`` in the config, ``--key`` as a flag."""
    if not flag:
        return key_naming(table, key)
    return _FLAGS.get((table, key), "--" + key.replace("_", "-"))


def flag_naming(table: str, key: str) -> str:
    """:func:`option_name` for a single command."""
    return option_name(table, key, flag=True)


class Refusal(ConfigError, ValueError):
    """A value refused by a parser or validator: which key, what it needs, what it got.

    A :class:`ValueError` inside a model's validator (pydantic then reports it with the
    table's naming), a :class:`~coldindex.errors.ConfigError` anywhere else.
    """

    def __init__(self, key: str, expected: str, got: object) -> None:
        super().__init__(f"{key} needs to be {expected}, got: {got!r}.")
        self.key, self.expected, self.got = key, expected, got

    def __reduce__(self) -> tuple[type, tuple[str, str, object]]:  # type: ignore[override]
        return (type(self), (self.key, self.expected, self.got))


def _need(ok: bool, key: str, expected: str, got: object) -> None:
    if not ok:
        raise Refusal(key, expected, got)


# ---------------------------------------------------------------------------------------
# Parsers of option texts (pure; called by the validators and by nothing at run time)


def parse_span(text: str, key: str, what: str, lo: int, hi: int, wrap: bool = False
               ) -> list[int]:
    """Parse ``A-B`` (inclusive; with ``wrap`` B < A wraps, e.g. months 11-4) or ``a,b,c``.

    Every value must lie in ``lo..hi``; a list keeps its order but refuses repeats.
    """
    t = text.strip()
    try:
        if "-" in t[1:]:
            a, b = (int(v) for v in t.split("-", 1))
            _need(lo <= a <= hi and lo <= b <= hi, key, f"{what} in {lo}..{hi}", text)
            if a <= b:
                values = list(range(a, b + 1))
            else:
                _need(wrap, key, f"a span A-B with A <= B ({what})", text)
                values = [*range(a, hi + 1), *range(lo, b + 1)]
        else:
            values = [int(v) for v in t.split(",")]
    except ValueError as exc:
        if isinstance(exc, Refusal):
            raise
        raise Refusal(key, f"a span like {lo}-{lo + 2} or a list like {lo},{lo + 1} "
                      f"({what})", text) from None
    _need(bool(values) and all(lo <= v <= hi for v in values), key, f"{what} in {lo}..{hi}",
          text)
    _need(len(set(values)) == len(values), key, f"{what} without repeats", text)
    return values


def parse_months(text: str, key: str = "skill.months") -> list[int]:
    """Winter months ``A-B`` (wrapping over the new year, e.g. ``11-4``) or ``1,2,3``."""
    return parse_span(text, key, "months", 1, 12, wrap=True)


def parse_lags(text: str, key: str = "skill.lags") -> list[int]:
    """Lags ``A-B`` or ``0,1,3`` in whole years, sorted, spanning at most MAX_LAG_SPAN."""
    lags = sorted(parse_span(text, key, "whole years", 0, 10**4))
    _need(lags[-1] - lags[0] <= MAX_LAG_SPAN, key,
          f"lags spanning at most {MAX_LAG_SPAN} years (the cap on lags)", text)
    _need(lags[-1] <= 5 * MAX_LAG_SPAN, key, f"lags of at most {5 * MAX_LAG_SPAN} years",
          text)
    return lags


def parse_reference(text: str | None, key: str = "classify.reference"
                    ) -> tuple[int, int] | None:
    """A period ``A-B`` of years, or None when empty."""
    if not text:
        return None
    try:
        a, b = (int(v) for v in text.split("-"))
    except ValueError:
        raise Refusal(key, "two years A-B (or empty)", text) from None
    _need(a <= b, key, "two years A-B with A <= B", text)
    return a, b


def parse_rule(text: str, key: str = "classify.rule") -> float | None:
    """``tercile`` (None) or ``sd:K`` (K in 0..10 standard deviations)."""
    if text == "tercile":
        return None
    _need(text.startswith("sd:"), key, "tercile or sd:K", text)
    try:
        k = float(text[3:])
    except ValueError:
        k = float("nan")
    _need(math.isfinite(k) and 0 <= k <= 10, key, "sd:K with a number K in 0..10", text)
    return k


def parse_numbers(text: str, key: str) -> tuple[float, ...]:
    """Numbers separated by commas, e.g. thresholds ``2,0``."""
    try:
        values = tuple(float(v) for v in text.split(",") if v.strip())
    except ValueError:
        raise Refusal(key, "numbers separated by commas", text) from None
    _need(bool(values), key, "at least one number", text)
    return values


MAX_ZONES = 12  # cap on depth zones (each adds a row a year to regions.csv)


def parse_depth_zones(text: str, key: str = "index.depth_zones"
                      ) -> tuple[tuple[float, float], ...]:
    """Parse ``0-50,50-100,100-200`` into ``((0, 50), (50, 100), (100, 200))``. [m]

    Zones may leave gaps but must not overlap; depths are positive down.
    """
    if not text or not text.strip():
        return ()
    zones: list[tuple[float, float]] = []
    for part in text.split(","):
        bits = part.strip().split("-")
        try:
            if len(bits) != 2:
                raise ValueError
            lo, hi = float(bits[0]), float(bits[1])
        except ValueError:
            raise Refusal(key, "zones lo-hi in metres separated by commas (e.g. 0-50,50-100)",
                          part.strip()) from None
        _need(math.isfinite(lo) and math.isfinite(hi) and 0 <= lo < hi, key,
              "zones lo-hi with 0 <= lo < hi metres", part.strip())
        zones.append((lo, hi))
    _need(len(zones) <= MAX_ZONES, key, f"at most {MAX_ZONES} zones", len(zones))
    order = sorted(zones)
    for (lo1, hi1), (lo2, _) in zip(order, order[1:], strict=False):
        _need(lo2 >= hi1, key, "zones that do not overlap", f"{lo1:g}-{hi1:g}, {lo2:g}-...")
    return tuple(zones)


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


# ---------------------------------------------------------------------------------------
# The option tables


class _Table(BaseModel):
    """A table of options: frozen, unknown keys refused, no silent type coercion."""

    model_config = ConfigDict(frozen=True, extra="forbid", strict=True, allow_inf_nan=False)
    table: ClassVar[str] = ""

    def __init__(self, **data: Any) -> None:
        try:
            super().__init__(**data)
        except ValidationError as exc:  # built in code: name the config key
            err = _sentence(exc, type(self), self.table, False)
            err.validation = exc  # type: ignore[attr-defined]  # build() may rename it
            raise err from None

    @model_validator(mode="before")
    @classmethod
    def _lists_to_tuples(cls, data: Any) -> Any:
        """TOML lists become tuples; a flag's ``2,0`` becomes a tuple of numbers."""
        if not isinstance(data, Mapping):
            return data
        out = {}
        for k, v in data.items():
            field = cls.model_fields.get(k)
            if isinstance(v, list):
                v = tuple(v)
            elif isinstance(v, str) and field is not None and "tuple" in str(field.annotation):
                parts = tuple(p.strip() for p in v.split(",") if p.strip())
                v = parts if "str" in str(field.annotation) else tuple(_number(p) for p in parts)
            out[k] = v
        return out


def _number(text: str) -> Any:
    """A number from a flag's text, or the text itself (then refused as not a number)."""
    try:
        value = float(text)
    except ValueError:
        return text
    return int(value) if value.is_integer() and "." not in text and "e" not in text.lower() \
        else value


def _f(default: Any, help: str) -> Any:  # noqa: A002 - the help text of the flag
    return Field(default, description=help)


class IndexOptions(_Table):
    """Settings of the index computation (``coldindex index`` / ``[index]``)."""

    table: ClassVar[str] = "index"
    thresholds: tuple[float, ...] = _f((2.0, 0.0), "Thresholds for the cold-water areas [°C].")
    grid_km: float = _f(5.0, "Side of the square equal-area grid cells [km].")
    sims: int = _f(200, "Conditional simulations a year (0 = off).")
    seed: int = _f(20261201, "Base seed; each year draws from SeedSequence([seed, year]).")
    min_casts: int = _f(30, "Fewest usable casts for a year to get indices.")
    min_coverage: float = _f(0.75, "Lowest share of the domain within 1.5 reference station "
                             "spacings of a cast (the spacing is frozen with the domain).")
    method: str = _f("kriging", "kriging or idw.")
    variogram: str = _f("auto", "Variogram family: " + ", ".join(FAMILIES) + ", or auto "
                        "(chosen by the pooled likelihood of the yearly fits, or pooled "
                        "cross-validation with fit wls; then frozen).")
    fit: str = _f("reml", "Variogram fit: " + "; ".join(f"{k}: {v}" for k, v in FITS.items())
                  + ".")
    param_draws: int = _f(20, "Variogram parameter draws a year shared by the simulations, "
                          "so the intervals include the variogram's uncertainty (0 = fitted "
                          "parameters only).")
    variogram_params: tuple[float, ...] = _f((), "Fixed variogram parameters "
                                             "sill,len_km,nugget [°C², km, °C²] used every "
                                             "year instead of a fit (needs a variogram "
                                             "family, not auto; the simulations then use "
                                             "these parameters alone). Empty: fitted.")
    per_year_family: bool = _f(False, "Opt in: choose the variogram family separately each "
                               "year.")
    freeze_tolerance_c: float = _f(0.2, "Sensor tolerance below TEOS-10's freezing point "
                                   "[°C].")
    max_bottom_c: float = _f(20.0, "Highest plausible bottom temperature [°C].")
    default_salinity: float = _f(34.0, "Practical salinity for the freezing point of a cast "
                                 "without one.")
    # Common practice, no single source: |z| > 4 is rare under N(0, 1)
    outlier_z: float = _f(4.0, "Spatial-outlier threshold on |z|, the leave-one-out "
                          "standardized residual from the year's fit; flagged casts are kept "
                          "out of the refit (0 = off).")
    depth_zones: str = _f("", "Depth zones from the bathymetry [m], e.g. 0-50,50-100,100-200: "
                          "every index per zone in regions.csv.")
    timing_drift: bool = _f(False, "Opt in: the survey day as an external drift; maps and "
                            "indices are adjusted to reference_day.")
    reference_day: float = _f(0.0, "Day of the survey year the indices are adjusted to with "
                              "the timing drift (0 = median survey day of the first run, "
                              "then frozen).")

    @model_validator(mode="after")
    def _valid(self) -> IndexOptions:
        t = self.thresholds
        _need(len(t) > 0, "thresholds", "at least one threshold", list(t))
        _need(len(t) <= MAX_THRESHOLDS, "thresholds",
              f"at most {MAX_THRESHOLDS} thresholds (the cap on list lengths)", len(t))
        _need(all(-5.0 <= v <= 40.0 for v in t), "thresholds",
              "finite temperatures in -5..40 °C", list(t))
        _need(len(set(t)) == len(t), "thresholds", "distinct values", list(t))
        _need(1.0 <= self.grid_km <= 100.0, "grid_km", "a value in 1..100 km", self.grid_km)
        _need(0 <= self.sims <= 5000, "sims", "a whole number in 0..5000", self.sims)
        _need(0 <= self.seed < 2**63, "seed", "a whole number >= 0", self.seed)
        _need(self.min_casts >= 5, "min_casts", "at least 5", self.min_casts)
        _need(0.0 <= self.min_coverage <= 1.0, "min_coverage", "a share in 0..1",
              self.min_coverage)
        _need(self.method in METHODS, "method", f"one of {', '.join(METHODS)}", self.method)
        _need(self.fit in FITS, "fit", f"one of {', '.join(FITS)}", self.fit)
        _need(0 <= self.param_draws <= 200, "param_draws", "a whole number in 0..200",
              self.param_draws)
        _need(self.variogram in VARIOGRAM_CHOICES, "variogram",
              f"one of {', '.join(VARIOGRAM_CHOICES)}", self.variogram)
        _need(0.0 <= self.freeze_tolerance_c <= 2.0, "freeze_tolerance_c",
              "a value in 0..2 °C", self.freeze_tolerance_c)
        _need(0.0 < self.max_bottom_c <= 40.0, "max_bottom_c", "a value in 0..40 °C",
              self.max_bottom_c)
        _need(0.0 < self.default_salinity <= 42.0, "default_salinity",
              "a practical salinity in 0..42", self.default_salinity)
        _need(self.outlier_z == 0.0 or 2.5 <= self.outlier_z <= 20.0, "outlier_z",
              "0 (off) or a value in 2.5..20", self.outlier_z)
        _need(not self.timing_drift or self.method == "kriging", "timing_drift",
              "false with method idw (a drift needs kriging)", self.timing_drift)
        _need(-92.0 <= self.reference_day <= 458.0, "reference_day",
              "a day of the survey year in -92..458 (0 = median survey day, frozen)",
              self.reference_day)
        vp = self.variogram_params
        if vp:
            _need(len(vp) == 3 and vp[0] > 0 and vp[1] > 0 and vp[2] >= 0,
                  "variogram_params", "three numbers sill,len_km,nugget with sill > 0, "
                  "len_km > 0 and nugget >= 0", list(vp))
            _need(self.variogram in FAMILIES and not self.per_year_family, "variogram",
                  "a family (not auto) when variogram_params are given", self.variogram)
        if self.depth_zones:
            self.zones()
        return self

    def zones(self) -> tuple[tuple[float, float], ...]:
        """The parsed depth zones (``depth_zones``) [m]."""
        return parse_depth_zones(self.depth_zones, "depth_zones")


class ReadOptions(_Table):
    """``[read]``: how the casts table is read (regional exports)."""

    table: ClassVar[str] = "read"
    decimal: str = _f("", "Decimal mark of the casts file: '.' or ',' (empty: detected; a "
                      "decimal comma is usual in semicolon-separated exports).")
    date_format: str = _f("", "Date format of the casts' date column, e.g. %d.%m.%Y (empty: "
                          "detected from the data; refused when day and month cannot be told "
                          "apart).")

    @model_validator(mode="after")
    def _valid(self) -> ReadOptions:
        _need(self.decimal in ("", ".", ","), "decimal", "'.' or ',' (or empty: detected)",
              self.decimal)
        _need(not self.date_format or "%" in self.date_format, "date_format",
              "a strptime format such as %d.%m.%Y (or empty: detected)", self.date_format)
        return self


class ClassifyConfig(_Table):
    """``[classify]``: the columns classified each year and the cut-value rule."""

    table: ClassVar[str] = "classify"
    columns: tuple[str, ...] = _f(("bottom_mean_c", "below_2c_km2"),
                                  "Columns of indices.csv classified each year.")
    rule: str = _f("tercile", "tercile or sd:K (mean ± K SD of the reference period).")
    reference: str = _f("", "Reference period A-B (empty: the whole record).")
    colder: str = _f("", "lower or higher: which values are colder (empty: from the column "
                     "name; areas below a threshold are colder when higher).")
    cut_values: tuple[float, ...] = _f((), "Cut values given outright: LOW,HIGH in the "
                                       "column's unit (one column only).")

    @model_validator(mode="after")
    def _valid(self) -> ClassifyConfig:
        _need(len(self.columns) > 0, "columns", "at least one column", list(self.columns))
        parse_rule(self.rule, "rule")
        parse_reference(self.reference, "reference")
        _need(self.colder in ("", "lower", "higher"), "colder", "lower or higher (or empty)",
              self.colder)
        cv = self.cut_values
        _need(len(cv) in (0, 2), "cut_values", "two numbers LOW,HIGH", list(cv))
        _need(not cv or (cv[0] <= cv[1] and max(map(abs, cv)) < 1e15), "cut_values",
              "two finite numbers LOW <= HIGH", list(cv))
        _need(not cv or len(self.columns) == 1, "cut_values",
              "given for one classified column only", list(cv))
        return self

    @property
    def period(self) -> tuple[int, int] | None:
        """The parsed reference period."""
        return parse_reference(self.reference, "reference")


class ShiftsConfig(_Table):
    """``[shifts]``: regime-shift settings (see ``coldindex shifts``)."""

    table: ClassVar[str] = "shifts"
    column: str = _f("bottom_mean_c", "The value column.")
    method: str = _f("both", "Detector: " + ", ".join(DETECTORS) + " or both.")
    cutoff: int = _f(10, "STARS cut-off length [years]; a shift in the last cutoff years of "
                     "the record is provisional.")
    alpha: float = _f(0.1, "Detection level of STARS itself (the t-test that sets its "
                      "threshold); the verdict is p_max.")
    huber: float = _f(1.0, "STARS Huber weight parameter [SD].")
    prewhiten: str = _f("none", "none, ip4 or mpk.")
    subsample: int = _f(0, "Subsample length for the prewhitening estimate (0: (cutoff + 1) "
                        "/ 3, at least 5).")
    min_size: int = _f(5, "PELT shortest regime [years].")
    boot: int = _f(999, "Red-noise bootstrap replicates (0 = off).")
    seed: int = _f(20261201, "Random seed of the bootstrap.")
    null_window: int = _f(15, "Window of the shift-robust lag-1 estimate of the bootstrap "
                          "null [years].")
    p_max: float = _f(0.05, "Largest family-wise p-value for a shift to survive the "
                      "red-noise test (both methods).")

    min_years: ClassVar[int] = 20  # Common practice, no single source: STARS needs ~2 cut-offs

    @model_validator(mode="after")
    def _valid(self) -> ShiftsConfig:
        _need(self.method in (*DETECTORS, "both"), "method",
              f"one of {', '.join(DETECTORS)}, both", self.method)
        _need(self.cutoff >= 2, "cutoff", "a whole number >= 2", self.cutoff)
        _need(0 < self.alpha < 1, "alpha", "a value in (0, 1) (STARS' detection level)",
              self.alpha)
        _need(0 < self.p_max < 1, "p_max", "a value in (0, 1) (the largest p-value for a "
              "shift to survive)", self.p_max)
        _need(self.huber > 0, "huber", "a value > 0", self.huber)
        _need(self.prewhiten in ("none", "ip4", "mpk"), "prewhiten", "one of none, ip4, mpk",
              self.prewhiten)
        _need(self.subsample == 0 or self.subsample >= 3, "subsample",
              "0 (automatic) or a whole number >= 3", self.subsample)
        _need(self.min_size >= 2, "min_size", "a whole number >= 2", self.min_size)
        _need(0 <= self.boot <= 100_000, "boot", "a whole number in 0..100000", self.boot)
        _need(0 <= self.seed < 2**63, "seed", "a whole number >= 0", self.seed)
        _need(self.null_window >= 5, "null_window", "a whole number >= 5", self.null_window)
        return self

    @property
    def methods(self) -> tuple[str, ...]:
        """The detectors to run."""
        return tuple(DETECTORS) if self.method == "both" else (self.method,)


class SkillConfig(_Table):
    """``[skill]``: ice-skill settings (see ``coldindex skill``)."""

    table: ClassVar[str] = "skill"
    column: str = _f("bottom_mean_c", "The target column.")
    months: str = _f("11-4", "Winter months in order, e.g. 11-4 (wraps over the new year) or "
                     "5-10.")
    survey_month: int = _f(0, "Month the survey starts, 1..12 (0: the month of the target's "
                           "median survey day). A winter is labelled with the year of the "
                           "first survey that starts after its last month; lag 0 pairs it "
                           "with that survey (a July survey with months 11-4 puts Nov-Dec of "
                           "Y in winter Y+1; a January survey with months 5-10 puts May-Oct of "
                           "Y in winter Y+1).")
    winter: str = _f("mean", "Winter aggregate: mean or max.")
    lags: str = _f("0-2", "Lags in years, e.g. 0-2: lag L pairs a winter with the survey L "
                   "years after the first survey that follows it. The hindcast and outlook "
                   "choose predictor and lag among these.")
    confidence: float = _f(0.9, "Confidence of the intervals.")
    reference: str = _f("", "Reference period A-B for anomalies, cut values and the "
                        "climatological outlook (empty: the whole record).")
    leave_out: int = _f(3, "Years left out around each hindcast year (odd; 1 = "
                        "leave-one-out).")
    outlook_lag: int = _f(-1, "Use only this lag (one of lags) for the hindcast and outlook "
                          "(-1: chosen inside the hindcast folds).")
    outlook_q_max: float = _f(0.1, "Largest q-value the chosen predictor may have; above it, "
                              "or without positive cross-validated skill, the outlook is "
                              "climatological.")

    min_years: ClassVar[int] = 10  # Common practice, no single source: a hindcast needs ~10

    @model_validator(mode="after")
    def _valid(self) -> SkillConfig:
        parse_months(self.months, "months")
        lags = parse_lags(self.lags, "lags")
        parse_reference(self.reference, "reference")
        _need(self.outlook_lag == -1 or self.outlook_lag in lags, "outlook_lag",
              f"one of the lags {self.lags} (or -1: chosen inside the hindcast folds)",
              self.outlook_lag)
        _need(0 < self.outlook_q_max <= 1, "outlook_q_max", "a value in (0, 1]",
              self.outlook_q_max)
        _need(0 <= self.survey_month <= 12, "survey_month",
              "a month in 1..12 (or 0: the month of the target's median survey day)",
              self.survey_month)
        _need(self.winter in ("mean", "max"), "winter", "mean or max", self.winter)
        _need(0 < self.confidence < 1, "confidence", "a value in (0, 1)", self.confidence)
        _need(self.leave_out >= 1 and self.leave_out % 2 == 1, "leave_out",
              "an odd whole number >= 1", self.leave_out)
        return self

    @property
    def month_list(self) -> list[int]:
        """The parsed winter months."""
        return parse_months(self.months, "months")

    @property
    def lag_list(self) -> list[int]:
        """The parsed lags."""
        return parse_lags(self.lags, "lags")

    @property
    def period(self) -> tuple[int, int] | None:
        """The parsed reference period."""
        return parse_reference(self.reference, "reference")


class ProjectConfig(_Table):
    """``[project]``: projection settings (see ``coldindex project``)."""

    table: ClassVar[str] = "project"
    column: str = _f("bottom_mean_c", "The observed column projected.")
    adjust: str = _f("qdm", "Bias adjustment: " + "; ".join(f"{k}: {v}" for k, v in
                                                             ADJUSTMENTS.items()) + ".")
    calibration: str = _f("", "Calibration period A-B (empty: the overlap of model and "
                          "observed years; at least 20 shared years).")
    short_calibration: bool = _f(False, "Accept fewer than 20 calibration years (needs an "
                                 "explicit calibration; recorded in emergence.csv).")
    window: int = _f(10, "Window for the stop year [years].")
    p_stop: float = _f(0.1, "Cold years have stopped when P(at least one in the window) is "
                       "below this.")
    units: str = _f("", "Unit of the trajectory values, checked against the observed column "
                    "(empty: not checked).")

    min_years: ClassVar[int] = 20  # the calibration-length guard of coldindex.project

    @model_validator(mode="after")
    def _valid(self) -> ProjectConfig:
        parse_reference(self.calibration, "calibration")
        _need(not self.short_calibration or bool(self.calibration), "short_calibration",
              "false unless the calibration period is given", self.short_calibration)
        _need(self.adjust in ADJUSTMENTS, "adjust", f"one of {', '.join(ADJUSTMENTS)}",
              self.adjust)
        _need(1 <= self.window <= 100, "window", "a whole number in 1..100", self.window)
        _need(0 < self.p_stop < 1, "p_stop", "a value in (0, 1)", self.p_stop)
        return self

    @property
    def period(self) -> tuple[int, int] | None:
        """The parsed calibration period."""
        return parse_reference(self.calibration, "calibration")


class CovariatesConfig(_Table):
    """``[covariates]``: the assessor's covariate table."""

    table: ClassVar[str] = "covariates"
    columns: tuple[str, ...] = _f(("bottom_mean_c", "below_2c_km2", "below_0c_km2"),
                                  "Columns of indices.csv in covariates.csv.")
    lags: tuple[int, ...] = _f((1,), "Lags [years] added as _lag<L> columns.")
    reference: str = _f("", "Reference period A-B of the anomalies (empty: whole record).")

    @model_validator(mode="after")
    def _valid(self) -> CovariatesConfig:
        _need(all(1 <= lag <= MAX_LAG_SPAN for lag in self.lags), "lags",
              f"whole numbers in 1..{MAX_LAG_SPAN} (the cap on lags)", list(self.lags))
        _need(len(set(self.lags)) == len(self.lags), "lags", "distinct values",
              list(self.lags))
        parse_reference(self.reference, "reference")
        return self

    @property
    def period(self) -> tuple[int, int] | None:
        """The parsed reference period."""
        return parse_reference(self.reference, "reference")


class ReportConfig(_Table):
    """``[report]``: figures and the HTML page."""

    table: ClassVar[str] = "report"
    map_years: int = _f(4, "Most recent years mapped in the report.")
    title: str = _f("Bottom-temperature indicators", "Title of the report.")
    tolerance: float = _f(1e-6, "Relative change that counts as a revision (0 = any).")

    @model_validator(mode="after")
    def _valid(self) -> ReportConfig:
        _need(1 <= self.map_years <= 12, "map_years", "a whole number in 1..12",
              self.map_years)
        _need(0.0 <= self.tolerance < 1.0, "tolerance",
              "a relative change in 0..1 (0 = any change counts)", self.tolerance)
        _need(len(self.title) <= 200, "title", "at most 200 characters", len(self.title))
        return self


class ProfileOptions(_Table):
    """``[profiles]``: profiles to bottom values (see :mod:`coldindex.profiles`)."""

    table: ClassVar[str] = "profiles"
    max_gap_m: float = _f(10.0, "The deepest good sample may lie at most this far above the "
                          "sea floor [m]: a CTD stopped a few metres above the floor passes, "
                          "a cast stopped in the water column does not.")
    average_m: float = _f(0.0, "Average the good samples this far above the deepest (0 = the "
                          "deepest alone) [m].")
    min_c: float = -2.5  # Source: Wong et al. 2020, Argo QC manual v3.3, test 6 (global range)
    max_c: float = 40.0  # Source: Wong et al. 2020, Argo QC manual v3.3, test 6 (global range)
    min_salinity: float = 2.0  # Source: Wong et al. 2020, Argo QC manual v3.3, test 6
    max_salinity: float = 41.0  # Source: Wong et al. 2020, Argo QC manual v3.3, test 6
    max_depth_m: float = 11000.0  # Common practice, no single source: the deepest ocean
    spike_c: float = 6.0  # Source: Wong et al. 2020, Argo QC manual v3.3, test 9 (p < 500 dbar)
    spike_deep_c: float = 2.0  # Source: Wong et al. 2020, Argo QC manual v3.3, test 9

    @model_validator(mode="after")
    def _valid(self) -> ProfileOptions:
        _need(0.0 <= self.max_gap_m <= 1000.0, "max_gap_m", "a distance in 0..1000 m",
              self.max_gap_m)
        _need(0.0 <= self.average_m <= 100.0, "average_m", "a distance in 0..100 m",
              self.average_m)
        _need(self.min_c < self.max_c, "min_c", "below max_c", self.min_c)
        _need(self.min_salinity < self.max_salinity, "min_salinity", "below max_salinity",
              self.min_salinity)
        _need(self.max_depth_m > 0, "max_depth_m", "a depth > 0 m", self.max_depth_m)
        _need(self.spike_c > 0 and self.spike_deep_c > 0, "spike_c",
              "thresholds > 0 °C (spike_c and spike_deep_c)", (self.spike_c, self.spike_deep_c))
        return self


class IceFieldsOptions(_Table):
    """``[ice_fields]``: gridded ice to the monthly series (see :mod:`coldindex.icefields`)."""

    table: ClassVar[str] = "ice_fields"
    # From memory: CICE's rhoi (Hunke et al., CICE documentation)
    density_kg_m3: float = _f(917.0, "Sea-ice density for the mass [kg m-3]; 917 is the "
                              "pure-ice density sea-ice models use.")
    # Common practice, no single source (passive-microwave extent)
    extent_threshold: float = _f(0.15, "Concentration (fraction) from which a cell counts "
                                 "toward the extent.")
    thickness: str = _f("auto", "auto (from sea_ice_thickness's cell_methods), floe (times "
                        "concentration) or cell (already a mean over the cell).")
    quantity: str = _f("mass_gt", "The series the skill stage reads: "
                       + ", ".join(ICE_QUANTITIES) + ".")
    region: str = _f("", "The region whose series the skill stage reads (empty: the only "
                     "region).")

    @model_validator(mode="after")
    def _valid(self) -> IceFieldsOptions:
        _need(500.0 <= self.density_kg_m3 <= 1000.0, "density_kg_m3",
              "a density in 500..1000 kg m-3", self.density_kg_m3)
        _need(0.0 < self.extent_threshold <= 1.0, "extent_threshold",
              "a concentration fraction in (0, 1] (15 % is 0.15)", self.extent_threshold)
        _need(self.thickness in ("auto", "floe", "cell"), "thickness", "one of auto, floe, cell",
              self.thickness)
        _need(self.quantity in ICE_QUANTITIES, "quantity", f"one of {', '.join(ICE_QUANTITIES)}",
              self.quantity)
        return self


class Inputs(_Table):
    """Input paths (``[inputs]``), resolved relative to the config file."""

    model_config = ConfigDict(frozen=True, extra="forbid", strict=False)
    table: ClassVar[str] = "inputs"
    casts: Path | None = _f(None, "CSV or Parquet: year, lat, lon, bottom_c, ...")
    profiles: Path | None = _f(None, "Instead of casts: CTD profiles (CF NetCDF or a long "
                               "CSV/Parquet table).")
    domain: Path | None = _f(None, "Domain polygon (GeoJSON); without it a domain is derived "
                             "and frozen.")
    bathymetry: Path | None = _f(None, "Bathymetry NetCDF: depth as external drift.")
    ice: Path | None = _f(None, "Monthly ice (year, month, ice) for the skill stage.")
    ice_fields: tuple[Path, ...] = _f((), "Instead of ice: gridded ice NetCDF files.")
    ice_regions: Path | None = _f(None, "Regions of the ice series (default: the domain).")
    trajectories: tuple[Path, ...] = _f((), "Model trajectories for the projection stage.")
    regions: Path | None = _f(None, "Named regions (GeoJSON, no overlaps) -> regions.csv.")
    coastline: Path | None = _f(None, "Coastline lines or polygons drawn on the maps.")

    def files(self) -> dict[str, Path]:
        """Every given input by its config key, e.g. ``inputs.trajectories[0]``."""
        out: dict[str, Path] = {}
        for name in type(self).model_fields:
            value = getattr(self, name)
            if isinstance(value, tuple):
                out.update({f"inputs.{name}[{k}]": p for k, p in enumerate(value)})
            elif value is not None:
                out[f"inputs.{name}"] = value
        return out


_STAGE_TABLES: dict[str, type[_Table]] = {
    c.table: c for c in (IndexOptions, ReadOptions, ClassifyConfig, ShiftsConfig, SkillConfig,
                         ProjectConfig, CovariatesConfig, ReportConfig, ProfileOptions,
                         IceFieldsOptions)}
_MAP_TABLES = ("columns", "ice_columns", "trajectory_columns", "profile_columns")


class Config(BaseModel):
    """A whole validated configuration."""

    model_config = ConfigDict(frozen=True, extra="forbid", arbitrary_types_allowed=True)
    inputs: Inputs = Field(default_factory=Inputs)
    columns: dict[str, str] = Field(default_factory=dict)
    ice_columns: dict[str, str] = Field(default_factory=dict)
    trajectory_columns: dict[str, str] = Field(default_factory=dict)
    profile_columns: dict[str, str] = Field(default_factory=dict)
    index: IndexOptions = Field(default_factory=IndexOptions)
    read: ReadOptions = Field(default_factory=ReadOptions)
    classify: ClassifyConfig = Field(default_factory=ClassifyConfig)
    shifts: ShiftsConfig = Field(default_factory=ShiftsConfig)
    skill: SkillConfig = Field(default_factory=SkillConfig)
    project: ProjectConfig = Field(default_factory=ProjectConfig)
    covariates: CovariatesConfig = Field(default_factory=CovariatesConfig)
    report: ReportConfig = Field(default_factory=ReportConfig)
    profiles: ProfileOptions = Field(default_factory=ProfileOptions)
    ice_fields: IceFieldsOptions = Field(default_factory=IceFieldsOptions)
    source: Path | None = None

    def replace(self, **tables: Mapping[str, Any]) -> Config:
        """A copy with some options changed, validated, e.g. ``replace(index={"sims": 4})``."""
        update = {name: build(_STAGE_TABLES[name], {**getattr(self, name).model_dump(),
                                                    **values})
                  for name, values in tables.items()}
        return self.model_copy(update=update)


# ---------------------------------------------------------------------------------------
# Building the models, with one sentence for the first problem


_TYPE_WORDS = {"int_type": "a whole number", "float_type": "a finite number",
               "finite_number": "a finite number", "bool_type": "true or false",
               "string_type": "a string", "tuple_type": "a list",
               "int_from_float": "a whole number"}


def _sentence(exc: ValidationError, cls: type[_Table], table: str, flag: bool) -> ConfigError:
    """One sentence for the first error pydantic found, naming key or flag."""
    err = exc.errors(include_url=False)[0]
    loc = [str(x) for x in err["loc"] if not isinstance(x, int)]
    ctx_error = (err.get("ctx") or {}).get("error")
    if isinstance(ctx_error, Refusal):
        name = option_name(table, ctx_error.key, flag=flag)
        return ConfigError(f"{name} needs to be {ctx_error.expected}, got: "
                           f"{ctx_error.got!r}.")
    key = loc[0] if loc else ""
    name = option_name(table, key, flag=flag)
    if err["type"] == "extra_forbidden":
        allowed = sorted(k for k in cls.model_fields)
        shown = ", ".join(option_name(table, k, flag=flag) if flag else k for k in allowed)
        return ConfigError(f"{name} is not a known {'option' if flag else 'key'}; allowed: "
                           f"{shown}.")
    words = _TYPE_WORDS.get(err["type"], err["msg"].lower())
    field = cls.model_fields.get(key)
    nested = any(isinstance(x, int) for x in err["loc"])  # an item of a list
    if field is not None and "tuple" in str(field.annotation) and not nested:
        inner = "names" if "str" in str(field.annotation) else "numbers"
        words = f"a list of {inner}"
    elif nested:
        words = ("a list of names" if err["type"] == "string_type" else
                 "a list of finite numbers" if err["type"] == "finite_number"
                 else "a list of numbers")
    return ConfigError(f"{name} needs to be {words}, got: {err['input']!r}.")


def build(cls: type[Any], values: Mapping[str, Any], *, flag: bool = False,
          table: str | None = None) -> Any:
    """Validate one table of options; the first problem becomes one :class:`ConfigError`.

    Parameters
    ----------
    cls
        The table's model, e.g. :class:`IndexOptions`.
    values
        Key/value pairs as read from TOML, or the flags of a command (by key).
    flag
        Name options as flags (``--grid-km``) rather than keys (``index.grid_km``).
    table
        Table name for messages (default: the model's).

    Returns
    -------
    object
        The validated options.
    """
    name = cls.table if table is None else table
    if not isinstance(values, Mapping):
        raise ConfigError(f"[{name}] needs to be a table of key = value pairs, got: "
                          f"{values!r}.")
    try:
        return cls.model_validate(dict(values))
    except ConfigError as err:  # from the model's __init__: named as a config key
        exc = getattr(err, "validation", None)
        if exc is None:
            raise
        raise _sentence(exc, cls, name, flag) from None
    except ValidationError as exc:
        raise _sentence(exc, cls, name, flag) from None


def from_flags(cls: type[Any], **values: Any) -> Any:
    """A command's options from its flags; None means "not given" (the default)."""
    return build(cls, {k: v for k, v in values.items() if v is not None}, flag=True)


def options_from_mapping(cls: type[Any], table: Mapping[str, Any], where: str) -> Any:
    """Build a table's options from a mapping, refusing unknown keys (see :func:`build`)."""
    return build(cls, table, table=where)


def index_options_from_mapping(table: Mapping[str, Any], where: str = "index") -> IndexOptions:
    """Build :class:`IndexOptions` from a mapping (see :func:`build`)."""
    result: IndexOptions = build(IndexOptions, table, table=where)
    return result


def _string_map(table: Any, key: str) -> dict[str, str]:
    if not isinstance(table, dict):
        raise ConfigError(f"[{key}] needs to be a table of ours = \"theirs\" pairs, got: "
                          f"{table!r}.")
    for k, v in table.items():
        if not isinstance(v, str):
            raise ConfigError(f"{key}.{k} needs to be a header name (string), got: {v!r}.")
    return dict(table)


def config_from_mapping(raw: Mapping[str, Any], base: Path, source: Path | None = None
                        ) -> Config:
    """Validate a parsed config mapping (:func:`coldindex.io.files.load_config` reads one)."""
    known = {"inputs", *_MAP_TABLES, *_STAGE_TABLES}
    for key in raw:
        if key not in known:
            raise ConfigError(f"[{key}] is not a known table; allowed tables: "
                              f"{', '.join(sorted(known))}.")
    inputs_raw = raw.get("inputs", {})
    if not isinstance(inputs_raw, dict):
        raise ConfigError(f"[inputs] needs to be a table of paths, got: {inputs_raw!r}.")
    paths: dict[str, Any] = {}
    for key, value in inputs_raw.items():
        if key not in Inputs.model_fields:
            raise ConfigError(f"inputs.{key} is not a known key; allowed keys: "
                              f"{', '.join(sorted(Inputs.model_fields))}.")
        many = key in ("trajectories", "ice_fields")
        items = value if many and isinstance(value, list) else [value]
        if not all(isinstance(v, str) and v.strip() for v in items):
            raise ConfigError(f"inputs.{key} needs to be "
                              f"{'a path or a list of paths' if many else 'a path (string)'},"
                              f" got: {value!r}.")
        resolved = tuple(base / v for v in items)
        paths[key] = resolved if many else resolved[0]
    tables = {key: build(cls, raw.get(key, {})) for key, cls in _STAGE_TABLES.items()}
    maps = {key: _string_map(raw.get(key, {}), key) for key in _MAP_TABLES}
    cfg = Config(inputs=Inputs(**paths), source=source, **maps, **tables)  # type: ignore[arg-type]
    check_columns(cfg)
    return cfg


def check_columns(cfg: Config) -> None:
    """Every column a stage reads from ``indices.csv`` exists with these thresholds."""
    from coldindex.schema import indices_table

    if cfg.index.depth_zones and cfg.inputs.bathymetry is None:
        raise ConfigError("index.depth_zones needs inputs.bathymetry to place the cells in "
                          "depth zones; add the bathymetry or leave the zones empty.")
    names = set(indices_table(cfg.index.thresholds, with_sims=cfg.index.sims > 0,
                              with_timing=cfg.index.timing_drift,
                              with_surface=True).names) - {
        "year", "variogram", "simulation", "note"}
    wanted = [("classify.columns", c) for c in cfg.classify.columns] + [
        ("covariates.columns", c) for c in cfg.covariates.columns] + [
        ("shifts.column", cfg.shifts.column), ("skill.column", cfg.skill.column),
        ("project.column", cfg.project.column)]
    for key, col in wanted:
        if col not in names:
            raise ConfigError(f"{key} names {col!r}, which indices.csv will not have with "
                              f"thresholds {list(cfg.index.thresholds)}; choose among "
                              f"bottom_mean_c and the below_<T>c_km2 columns.")


# ---------------------------------------------------------------------------------------
# The template that `coldindex init` writes: generated from the models, so it cannot drift


_TEMPLATE_HEAD = """\
# coldindex configuration: one file drives `coldindex update`.
# Paths are relative to this file. Only inputs.casts (or, instead, inputs.profiles) is
# needed; every other line shows a default or an optional input, commented out.
# Check it in seconds with: coldindex update THIS_FILE --out RELEASES --check
"""

_MAP_HELP = {
    "columns": 'Map your casts headers to ours: ours = "theirs", e.g. bottom_c = "TempBottom"',
    "ice_columns": 'year = "Yr", month = "Mon", ice = "IceMass"',
    "trajectory_columns": 'model = "GCM", value = "tob"',
    "profile_columns": 'cast = "CastID", temperature_c = "TEMP", pressure_dbar = "PRES"',
}


def _toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return '"' + value.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(value, tuple):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    if isinstance(value, Path):
        return _toml_value(value.as_posix())
    return repr(value)


_EXAMPLES: dict[str, Any] = {"profiles": "profiles.nc", "bathymetry": "bathymetry.nc",
                             "ice": "ice.csv", "ice_fields": ("ice_fields.nc",),
                             "trajectories": ("trajectories.csv",)}


def template(casts: str | None = "casts.csv", inputs: Mapping[str, Any] | None = None,
             settings: Mapping[str, Mapping[str, Any]] | None = None) -> str:
    """The commented configuration ``coldindex init`` writes.

    Parameters
    ----------
    casts
        Path of the casts file, relative to the config (None: no casts line, e.g. when
        ``inputs`` gives profiles).
    inputs
        Optional inputs to switch on (key -> path or list of paths), e.g. the demo's.
    settings
        Options set to other values than their defaults, by table, e.g.
        ``{"skill": {"months": "5-10"}}``.

    Returns
    -------
    str
        TOML text that validates as written.
    """
    import textwrap

    given = {**({"casts": casts} if casts else {}), **(inputs or {})}
    chosen = settings or {}
    lines = [_TEMPLATE_HEAD, "[inputs]"]
    for key, field in Inputs.model_fields.items():
        lines.append(f"# {field.description}")
        if key in given:
            value = given[key]
            value = tuple(value) if isinstance(value, list) else value
            lines.append(f"{key} = {_toml_value(value)}")
        else:
            example = _toml_value(_EXAMPLES.get(key, f"{key}.geojson"))
            lines.append(f"# {key} = {example}")
    for key in _MAP_TABLES:
        lines += ["", f"[{key}]", f"# {_MAP_HELP[key]}"]
    for table, cls in _STAGE_TABLES.items():
        lines += ["", f"[{table}]"]
        for key, field in cls.model_fields.items():
            if field.description:
                lines += ["# " + s for s in textwrap.wrap(field.description, 86)]
            if key in chosen.get(table, {}):
                lines.append(f"{key} = {_toml_value(chosen[table][key])}")
            else:
                lines.append(f"# {key} = {_toml_value(field.default)}")
    return "\n".join(lines) + "\n"
