"""Every input and output column: its name, unit and meaning.

Readers validate against these tables, writers order their columns by them,
and ``docs/outputs.md`` is generated from them (``python -m coldindex.schema``);
a test fails when the two drift apart.

Column names are lower snake case and valid identifiers in Python and R. The
unit comes last (``_c``, ``_km2``), followed only by statistical suffixes
(``_map``, ``_sd``, ``_lo90``, ``_hi90``, ``_z``) and then a lag (``_lag1``).
"""

from __future__ import annotations

import sys
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np


@dataclass(frozen=True)
class Column:
    """One column of a table.

    Parameters
    ----------
    name
        Column name as written in files.
    unit
        Unit (``degC``, ``km2``, ``1`` for dimensionless, ``-`` for text).
    meaning
        One sentence a reader of the file can rely on.
    kind
        ``int``, ``float``, ``str``, ``bool`` or ``date`` (inputs: a date readers rewrite
        as ISO 8601, its day-month order detected or given with ``date_format``).
    required
        Whether an input file must carry it (inputs only).
    """

    name: str
    unit: str
    meaning: str
    kind: str = "float"
    required: bool = False


@dataclass(frozen=True)
class Table:
    """A named file layout: its columns in order and a short description.

    ``internal`` names columns the computation's frame carries for its own use that the
    file never shows (e.g. the day of year in the QC frame); writers drop them.
    """

    name: str
    description: str
    columns: tuple[Column, ...]
    internal: tuple[str, ...] = ()

    @property
    def names(self) -> list[str]:
        """Column names in order."""
        return [c.name for c in self.columns]

    @property
    def required(self) -> list[str]:
        """Names of the columns an input file must carry."""
        return [c.name for c in self.columns if c.required]

    def get(self, name: str) -> Column:
        """Return the column called ``name``."""
        for c in self.columns:
            if c.name == name:
                return c
        raise KeyError(name)

    def conform(self, frame: Any) -> Any:
        """The frame's declared columns in declared order, ready to be written.

        Declared columns the frame lacks are left out (optional columns); ``internal``
        columns are dropped.

        Parameters
        ----------
        frame
            A pandas DataFrame.

        Returns
        -------
        pandas.DataFrame
            The frame's columns of this table, in the table's order.

        Raises
        ------
        ValueError
            The frame carries a column this table does not declare, or a column twice:
            a programming error (declare the column here, with its unit and meaning).
        """
        cols = [str(c) for c in frame.columns]
        dup = sorted({c for c in cols if cols.count(c) > 1})
        if dup:
            raise ValueError(f"{self.name}: the frame carries {', '.join(dup)} more than once.")
        names = self.names
        extra = [c for c in cols if c not in names and c not in self.internal]
        if extra:
            raise ValueError(f"{self.name}: the frame carries undeclared column(s) "
                             f"{', '.join(extra)}; declare them in coldindex/schema.py (name, "
                             "unit, meaning) or leave them out of the frame.")
        return frame[[c for c in names if c in cols]]


CASTS = Table(
    "casts",
    "Input: one bottom-temperature cast a row (CSV or Parquet). Map your own headers with "
    "`--columns ours=theirs,...`. Numbers may be written with a decimal comma in a file "
    "delimited by semicolons or tabs (detected when no number has a decimal point, or given "
    "as the decimal mark, `decimal`); a file mixing both marks is refused.",
    (
        Column("year", "-", "Survey year the cast belongs to.", "int", True),
        Column("lat", "degrees_north", "Latitude of the cast, -90..90.", "float", True),
        Column("lon", "degrees_east", "Longitude of the cast, -180..180 or 0..360.", "float", True),
        Column("bottom_c", "degC", "In-situ temperature near the sea floor (ITS-90).", "float",
               True),
        Column("station", "-", "Station name; without it a position rounded to 1 km stands "
               "for the station.", "str"),
        Column("date", "-", "Date of the cast: ISO 8601 (YYYY-MM-DD), or day, month and a "
               "four-digit year in either order (10.01.2019, 01/10/2019), the order detected "
               "from days above 12 or given with the date format (date_format).", "date"),
        Column("depth_m", "m", "Bottom depth at the cast, positive down.", "float"),
        Column("salinity", "1", "Practical salinity (PSS-78) near the bottom.", "float"),
        Column("surface_c", "degC", "Sea-surface temperature at the cast.", "float"),
    ),
)

ICE = Table(
    "ice",
    "Input: a monthly winter sea-ice series in calendar years and months. A winter is "
    "labelled with the year of the first survey that starts after the winter's last month, "
    "and lag 0 pairs that winter with that survey: with a July survey and winter months "
    "11-4, November and December of year Y belong to winter Y+1; with a January survey and "
    "winter months 5-10, May to October of year Y belong to winter Y+1.",
    (
        Column("year", "-", "Calendar year of the month.", "int", True),
        Column("month", "-", "Calendar month, 1..12.", "int", True),
        Column("ice", "as stated", "Ice mass (or extent) in the month; unit carried as "
               "metadata.", "float", True),
    ),
)

TRAJECTORIES = Table(
    "trajectories",
    "Input: annual climate-model trajectories of the same quantity as the observed column "
    "being projected, in the unit stated with `--units`.",
    (
        Column("model", "-", "Climate-model name.", "str", True),
        Column("scenario", "-", "Emission scenario name.", "str", True),
        Column("year", "-", "Year.", "int", True),
        Column("value", "as stated", "Annual value of the projected quantity.", "float", True),
        Column("member", "-", "Ensemble member of the model run.", "str"),
    ),
)

PROFILES = Table(
    "profiles",
    "Input: profiles as a long table, one sample a row (CSV or Parquet); `--profiles FILE` "
    "or `inputs.profiles`. Map your headers with `--profile-columns ours=theirs,...`. Give "
    "`depth_m` or `pressure_dbar` (sea pressure, the atmosphere excluded). CF "
    "discrete-sampling-geometry NetCDF (`featureType = \"profile\"`) is read too, its "
    "variables found by `standard_name`.",
    (
        Column("cast", "-", "Cast id: every sample of one cast carries the same id.", "str",
               True),
        Column("time", "-", "Date or date and time of the cast, ISO 8601 or day and month "
               "in either order (as the casts' date).", "date", True),
        Column("lat", "degrees_north", "Latitude of the cast.", "float", True),
        Column("lon", "degrees_east", "Longitude of the cast, -180..180 or 0..360.", "float",
               True),
        Column("temperature_c", "degC", "In-situ temperature of the sample (ITS-90).", "float",
               True),
        Column("depth_m", "m", "Depth of the sample below the surface, positive down.",
               "float"),
        Column("pressure_dbar", "dbar", "Sea pressure of the sample (absolute pressure less "
               "10.1325 dbar); converted to depth with TEOS-10.", "float"),
        Column("salinity", "1", "Practical salinity (PSS-78) of the sample.", "float"),
        Column("bottom_depth_m", "m", "Sea-floor depth recorded at the cast (echo sounder), "
               "positive down; preferred to the bathymetry file.", "float"),
        Column("station", "-", "Station name of the cast.", "str"),
        Column("year", "-", "Survey year of the cast (default: the calendar year of time).",
               "int"),
    ),
)

CASTS_FROM_PROFILES = Table(
    "casts.csv (from profiles)",
    "Output: one row a cast made from the profiles, the casts table the other commands read, "
    "with the provenance of each bottom value. `bottom_c` is blank for a cast flagged by the "
    "profile checks (`profile_flag`).",
    (
        Column("row", "-", "Row number (1 = first cast, casts sorted by id).", "int"),
        CASTS.get("year"), CASTS.get("station"),
        Column("date", "-", "Date of the cast, ISO 8601 (YYYY-MM-DD).", "str"),
        CASTS.get("lat"), CASTS.get("lon"),
        Column("depth_m", "m", "Sea-floor depth at the cast: recorded, else from the "
               "bathymetry file (see floor_source).", "float"),
        Column("bottom_c", "degC", "Bottom temperature: the deepest good sample, or the mean "
               "of the good samples within profiles.average_m of it.", "float"),
        Column("salinity", "1", "Practical salinity of the same samples.", "float"),
        Column("cast", "-", "Cast id in the profiles file.", "str"),
        Column("time", "-", "Time of the cast, ISO 8601.", "str"),
        Column("sample", "-", "Position along the profile (0-based, as stored) of the deepest "
               "good sample.", "int"),
        Column("sample_depth_m", "m", "Depth of that sample (TEOS-10 from pressure).",
               "float"),
        Column("sample_pressure_dbar", "dbar", "Sea pressure of that sample.", "float"),
        Column("n_averaged", "1", "Samples averaged into bottom_c.", "int"),
        Column("n_samples", "1", "Samples in the cast's profile.", "int"),
        Column("flagged_samples", "-", "Samples refused by the profile checks, by reason "
               "(`missing`, `implausible`, `non_monotonic`, `spike`), e.g. `spike 1`.", "str"),
        Column("floor_source", "-", "`recorded`, `bathymetry` or blank (unknown).", "str"),
        Column("gap_m", "m", "Sea-floor depth minus the deepest good sample's depth.",
               "float"),
        Column("deepest_c", "degC", "The value the deepest good samples gave, also when the "
               "cast is flagged.", "float"),
        Column("profile_flag", "-", "`ok` or the profile check that refused the cast.", "str"),
        Column("profile_detail", "-", "What exactly was wrong, with the values.", "str"),
    ),
)

ICE_FIELDS = Table(
    "ice_fields.csv",
    "Output of `coldindex ice` (and of the update with `inputs.ice_fields`): monthly sea-ice "
    "quantities per region, tidy. Daily fields are averaged over the month.",
    (
        Column("year", "-", "Calendar year.", "int"),
        Column("month", "-", "Calendar month, 1..12.", "int"),
        Column("region", "-", "Region name (the GeoJSON feature's `name`).", "str"),
        Column("quantity", "-", "`area_km2` (sum of concentration x cell area), `extent_km2` "
               "(area of the cells with concentration >= ice_fields.extent_threshold), "
               "`volume_km3` (sum of concentration x floe thickness x cell area) or `mass_gt` "
               "(volume x ice_fields.density_kg_m3); the unit is the name's suffix.", "str"),
        Column("value", "as named", "Monthly mean of the quantity.", "float"),
        Column("n_times", "1", "Time steps (days or months) averaged into the value.", "int"),
    ),
)

QC = Table(
    "qc.csv",
    "Output: every input row of the casts file with its quality-control flag. Flagged casts "
    "are excluded from the indices, never silently dropped.",
    (
        Column("row", "-", "Row of the cast in the input file as a spreadsheet shows it "
               "(the header is row 1, so the first data row is 2; blank lines count).", "int"),
        Column("year", "-", "Survey year as read (blank when unreadable).", "int"),
        Column("station", "-", "Station name, or the rounded position standing for it.", "str"),
        Column("lat", "degrees_north", "Latitude as read.", "float"),
        Column("lon", "degrees_east", "Longitude as read, in -180..180.", "float"),
        Column("bottom_c", "degC", "Bottom temperature as read.", "float"),
        Column("flag", "-", "`ok` or the reason the cast is excluded (see the flag list).", "str"),
        Column("detail", "-", "What exactly was wrong, with the offending value.", "str"),
    ),
    internal=("date", "depth_m", "salinity", "surface_c", "doy"),
)

QC_FLAGS: dict[str, str] = {
    "ok": "used",
    "missing": "a required value (year, lat, lon, bottom_c) is blank",
    "non_numeric": "a numeric value cannot be read as a number",
    "sentinel": "a value is a missing-data code such as -9999",
    "lat_out_of_range": "latitude outside -90..90",
    "lon_out_of_range": "longitude outside -180..360",
    "below_freezing": "bottom temperature below the TEOS-10 freezing point by more than the "
    "sensor tolerance",
    "above_max": "bottom temperature above the plausible maximum",
    "duplicate_copy": "an identical copy of another cast (same year and station or position); "
    "one copy is kept",
    "duplicate_conflict": "same year and station or position as another cast but different "
    "values; all copies excluded",
    "outside_domain": "position outside the survey domain",
    "date_outside_year": "the date lies more than a quarter (92 days) outside the labelled "
    "survey year",
    "spatial_outlier": "the leave-one-out standardized residual from the year's variogram fit "
    "(noisy variance: smooth part plus nugget) exceeds index.outlier_z in size; the cast is "
    "kept out of the refit and its z is in the detail",
    "not_near_bottom": "(profiles) the deepest good sample lies more than profiles.max_gap_m "
    "above the sea floor; the detail gives the gap",
    "floor_unknown": "(profiles) no recorded bottom depth and no bathymetry at the cast, so "
    "the deepest sample cannot be checked against the sea floor",
    "no_good_sample": "(profiles) no sample of the cast passed the profile checks (missing, "
    "implausible, non-monotonic pressure, spike)",
}

_STAT_SUFFIXES = {
    "_sd": "standard deviation over the conditional simulations",
    "_lo90": "5th percentile over the conditional simulations",
    "_hi90": "95th percentile over the conditional simulations",
}


def threshold_label(threshold: float) -> str:
    """Return a threshold in its shortest column form.

    ``2 -> '2'``, ``-1 -> 'm1'``, ``1.5 -> '1p5'``, ``0 -> '0'`` (never ``2p0``).

    Parameters
    ----------
    threshold
        Temperature threshold. [°C]

    Returns
    -------
    str
        The label used inside column names such as ``below_<label>c_km2``.
    """
    if not np.isfinite(threshold):
        raise ValueError(f"threshold needs to be finite, got: {threshold}")
    text = np.format_float_positional(float(threshold), trim="-")
    if text in ("-0", "0"):
        text = "0"
    return text.replace("-", "m").replace(".", "p")


def area_column(threshold: float) -> str:
    """Name of the expected-area column for ``threshold`` (e.g. ``below_2c_km2``)."""
    return f"below_{threshold_label(threshold)}c_km2"


def indices_table(thresholds: Sequence[float], with_sims: bool = True,
                  with_timing: bool = False, with_surface: bool = False) -> Table:
    """Layout of ``indices.csv`` for the given thresholds.

    Parameters
    ----------
    thresholds
        Temperature thresholds. [°C]
    with_sims
        Whether the simulation summaries (``_sd``, ``_lo90``, ``_hi90``) are present.
    with_timing
        Whether the survey-day drift columns are present (``index.timing_drift``).
    with_surface
        Whether the surface-temperature columns are present (casts with ``surface_c``).

    Returns
    -------
    Table
        The ordered column layout.
    """
    cols: list[Column] = [
        Column("year", "-", "Survey year.", "int"),
        Column("n_casts", "1", "Casts used after quality control.", "int"),
        Column("median_doy", "day of year", "Median day of year of the casts used (blank "
               "without dates).", "float"),
        Column("coverage", "1", "Share of the domain area within 1.5 reference station "
               "spacings of a used cast; the reference spacing (median over the years of the "
               "median nearest-neighbour distance between a year's casts) is frozen with the "
               "domain, so a denser year never scores lower.", "float"),
        Column("bottom_mean_c", "degC", "Area-weighted mean of the kriged bottom temperature "
               "over the domain.", "float"),
    ]
    if with_sims:
        cols += [
            Column(f"bottom_mean_c{s}", "degC", f"Area-weighted mean bottom temperature: {m}.")
            for s, m in _STAT_SUFFIXES.items()
        ]
    for t in thresholds:
        name = area_column(t)
        tl = np.format_float_positional(float(t), trim="-")
        cols.append(Column(name, "km2", f"Expected area with bottom temperature below {tl} °C: "
                           "sum of cell area times the kriging probability of being below.",
                           "float"))
        cols.append(Column(f"{name}_map", "km2", f"Area of the kriged map below {tl} °C "
                           "(kriging's smoothing biases it low for thresholds below the "
                           "field's median and high above it; kept for continuity with "
                           "map-based practice).", "float"))
        if with_sims:
            cols += [
                Column(f"{name}{s}", "km2", f"Area below {tl} °C: {m}.")
                for s, m in _STAT_SUFFIXES.items()
            ]
    cols += [
        Column("cv_rmse_c", "degC", "Leave-one-out cross-validation root-mean-square error at "
               "the casts.", "float"),
        Column("cv_bias_c", "degC", "Leave-one-out cross-validation mean error (observed minus "
               "predicted).", "float"),
        Column("cv_msse", "1", "Leave-one-out mean standardized squared error of the casts "
               "(noisy prediction variance, nugget included; near 1 when the fitted variogram "
               "matches the data at the casts' spacing; it does not check the areas' "
               "intervals; blank for IDW).", "float"),
    ]
    if with_surface:
        cols.append(Column("surface_mean_c", "degC", "Area-weighted mean of the kriged "
                           "sea-surface temperature over the domain (casts with surface_c; "
                           "its own variogram fit, no drift)."))
        for t in thresholds:
            tl = np.format_float_positional(float(t), trim="-")
            lab = threshold_label(t)
            cols.append(Column(f"surface_below_{lab}c_km2", "km2", "Expected area with "
                               f"sea-surface temperature below {tl} °C."))
            cols.append(Column(f"surface_above_{lab}c_km2", "km2", "Expected area with "
                               f"sea-surface temperature above {tl} °C (the domain area minus "
                               "the area below)."))
    if with_timing:
        cols += [
            Column("timing_rate_c_per_day", "degC/day", "Fitted change of bottom temperature "
                   "per survey day (the survey-day drift coefficient; with index.timing_drift)."),
            Column("timing_adjustment_c", "degC", "How much the adjustment to the reference "
                   "day moved the year's mean: rate times (reference day minus the year's "
                   "median survey day)."),
        ]
    if with_sims:
        cols.append(Column("simulation", "-", "How the conditional simulations were drawn: "
                           "circulant (circulant embedding on the grid), exact (Cholesky "
                           "factor, for long length scales), or both across the parameter "
                           "draws.", "str"))
    cols += [
        Column("variogram", "-", "Variogram family and fitted parameters (lengths in km, "
               "variances in degC2).", "str"),
        Column("note", "-", "Why a value is blank or how the year was treated.", "str"),
    ]
    return Table("indices.csv", "Output: one row a survey year.", tuple(cols))


#: Columns of indices.csv that describe the whole year's casts and fit, not a region.
_YEAR_ONLY = ("n_casts", "median_doy", "coverage", "cv_rmse_c", "cv_bias_c", "cv_msse",
              "timing_rate_c_per_day", "timing_adjustment_c",
              "simulation", "variogram")


def regions_table(thresholds: Sequence[float], with_sims: bool = True) -> Table:
    """Layout of ``regions.csv``: every index per year and region or depth zone.

    Parameters
    ----------
    thresholds
        Temperature thresholds. [°C]
    with_sims
        Whether the simulation summaries are present.

    Returns
    -------
    Table
        The ordered column layout (long: one row per year and region).
    """
    base = indices_table(thresholds, with_sims)
    cols = [base.get("year"),
            Column("region", "-", "Region name (from the regions file's name property) or "
                   "depth zone (`depth <lo>-<hi> m`, cells whose centre depth lies in "
                   "[lo, hi)).", "str"),
            Column("region_km2", "km2", "Area of the region inside the domain (edge cells "
                   "split exactly by area).", "float")]
    for c in base.columns:
        if c.name in ("year", "note", *_YEAR_ONLY):
            continue
        cols.append(Column(c.name, c.unit, c.meaning.replace("over the domain",
                                                             "over the region"), c.kind))
    cols.append(Column("note", "-", "Why a value is blank.", "str"))
    return Table("regions.csv", "Output: one row per survey year and region or depth zone "
                 "(`--regions`, `--depth-zones`); the intervals come from the same conditional "
                 "simulations as the domain's, so regions that cover the domain add up to it "
                 "in every realization. Year-wide columns (casts, coverage, cross-validation, "
                 "variogram) are in indices.csv.", tuple(cols))


FIELDS_VARIABLES = Table(
    "fields.nc",
    "Output: CF-1.8 NetCDF on the equal-area grid, dimensions (year, y, x).",
    (
        Column("bottom_temperature", "degC", "Kriged bottom temperature of the smooth process "
               "(nugget filtered); NaN outside the domain."),
        Column("bottom_temperature_sd", "degC", "Kriging standard deviation of the smooth "
               "process."),
        Column("p_below_<T>c", "1", "Probability that the bottom temperature is below T °C "
               "(one variable a threshold)."),
        Column("cell_area", "m2", "Area of the cell inside the domain (edge cells carry their "
               "fractional area)."),
        Column("lat", "degrees_north", "Latitude of the cell centre (2-D)."),
        Column("lon", "degrees_east", "Longitude of the cell centre (2-D), -180..180."),
        Column("n_casts", "1", "Casts used per year."),
        Column("cast_year, cast_lat, cast_lon, cast_bottom_c", "-", "The casts used, along "
               "dimension `cast`."),
    ),
)

CLASSES = Table(
    "classes.csv",
    "Output of `coldindex classify`: one row a year (the update's classes.csv: one row a "
    "year and classified column).",
    (
        Column("column", "-", "The classified column (only in the update's classes.csv, "
               "which holds every column of classify.columns).", "str"),
        Column("year", "-", "Year.", "int"),
        Column("value", "as input", "The classified value.", "float"),
        Column("class", "-", "`cold`, `average` or `warm` under the cut values (blank when "
               "the value is missing); a value equal to a cut value is average.", "str"),
        Column("anomaly", "as input", "Value minus the reference-period mean.", "float"),
        Column("z", "1", "Anomaly divided by the reference-period standard deviation "
               "(ddof = 1).", "float"),
        Column("p_cold", "1", "Probability of a cold year given the value's `_sd` (Gaussian); "
               "only when the series carries `<value>_sd`.", "float"),
        Column("p_average", "1", "Probability of an average year (as above).", "float"),
        Column("p_warm", "1", "Probability of a warm year (as above).", "float"),
    ),
)

CUTS = Table(
    "cuts.json",
    "Output of `coldindex classify`: the cut values for one column, read back with "
    "`--cuts FILE` (refused for another column).",
    (
        Column("column", "-", "Column the cut values were made for.", "str"),
        Column("low", "as column", "Lower cut value.", "float"),
        Column("high", "as column", "Upper cut value.", "float"),
        Column("rule", "-", "`tercile`, `sd:K` or `given`.", "str"),
        Column("reference", "-", "Reference period `A-B`, or null for the whole record.",
               "str"),
        Column("direction", "-", "`lower` when lower values are colder, `higher` when higher "
               "values are (cold-water areas).", "str"),
    ),
)

SHIFTS = Table(
    "shifts.csv",
    "Output of `coldindex shifts`: one row a detected shift.",
    (
        Column("method", "-", "`stars` or `pelt`.", "str"),
        Column("year", "-", "First year of the new regime.", "int"),
        Column("mean_before", "as input", "Mean of the regime before the shift.", "float"),
        Column("mean_after", "as input", "Mean of the regime after the shift.", "float"),
        Column("t_stat", "1", "Local shift statistic: GLS t (AR(1) errors, rho estimated in "
               "the model) of the step at this year, in the model with steps at this shift and "
               "its neighbouring shifts (the regimes either side).", "float"),
        Column("t_record", "1", "Whole-record shift statistic: GLS t (AR(1) errors) of a "
               "single step at this year, the record before against the record after.",
               "float"),
        Column("p_value", "1", "Family-wise p-value: the shift's smaller bootstrap p of "
               "`t_stat` and `t_record`, compared with the smaller p-values of red-noise null "
               "series run through the same detector, settings and statistics (min-p); blank "
               "with `--boot 0`. A shift survives when it is below `--p-max` "
               "(`shifts.p_max`).", "float"),
        Column("rsi", "1", "STARS regime shift index (blank for PELT).", "float"),
        Column("provisional", "-", "True when the first year lies within the last cut-off "
               "length (`--cutoff` years) of the record: the new regime is too short to judge "
               "and the shift may move or vanish as years are added (a withdrawn provisional "
               "shift is listed in the next release's `revisions.csv`).", "bool"),
    ),
)

REGIMES = Table(
    "regimes.csv",
    "Output of `coldindex shifts`: one row a regime between shifts.",
    (
        Column("method", "-", "`stars` or `pelt`.", "str"),
        Column("start", "-", "First year of the regime.", "int"),
        Column("end", "-", "Last year of the regime.", "int"),
        Column("mean", "as input", "Mean of the regime.", "float"),
        Column("n", "1", "Number of values in the regime.", "int"),
    ),
)

SKILL = Table(
    "skill.csv",
    "Output of `coldindex skill`: one row per predictor x lag.",
    (
        Column("predictor", "-", "`ice_<mon>` (one winter month) or `ice_winter_mean`/`_max`.",
               "str"),
        Column("lag", "years", "Target year minus winter label (0 = the first survey after "
               "the winter).", "int"),
        Column("n", "1", "Years the predictor and target share.", "int"),
        Column("n_eff", "1", "Effective sample size, Bretherton et al. (1999) eq. 31, from "
               "Marriott-Pope-Kendall corrected lag-1 autocorrelations.", "float"),
        Column("r", "1", "Pearson correlation of the anomalies.", "float"),
        Column("r_lo", "1", "Lower bound of the Fisher-z interval with n_eff.", "float"),
        Column("r_hi", "1", "Upper bound of the Fisher-z interval with n_eff.", "float"),
        Column("confidence", "1", "Confidence of the interval.", "float"),
        Column("p_value", "1", "Two-sided Fisher-z p-value with n_eff.", "float"),
        Column("q_value", "1", "Benjamini-Hochberg q-value across the whole table.", "float"),
        Column("r_persistence", "1", "Correlation of the target with its previous year, on "
               "the years both forecasts share.", "float"),
        Column("p_beats_persistence", "1", "One-sided Williams' t p-value that the (sign-"
               "oriented) ice correlation exceeds persistence's, with n_eff.", "float"),
    ),
)

HINDCAST = Table(
    "hindcast.csv",
    "Output of `coldindex skill`: the cross-validated hindcast, one row a year.",
    (
        Column("year", "-", "Target year.", "int"),
        Column("observed", "as target", "Observed target value.", "float"),
        Column("predicted", "as target", "Leave-k-out regression forecast; predictor and "
               "climatology chosen without the left-out years.", "float"),
        Column("persistence", "as target", "Previous year's observed value.", "float"),
    ),
)

OUTLOOK = Table(
    "outlook.json",
    "Output of `coldindex skill`: the outlook for the first survey after the newest winter.",
    (
        Column("year", "-", "Forecast year: the newest winter label plus the smallest lag "
               "considered.", "int"),
        Column("winter", "-", "Winter label the forecast uses (year minus lag).", "int"),
        Column("lag", "years", "Lag chosen (largest |r| on all shared years among the lags "
               "considered), or the one given with `--outlook-lag`.", "int"),
        Column("predictor", "-", "Predictor chosen with that lag.", "str"),
        Column("basis", "-", "`regression` (the ice predictor) or `climatology` (no "
               "demonstrable skill).", "str"),
        Column("reason", "-", "Why the outlook is climatological: the hindcast skill score "
               "against climatology is not positive, or the predictor's q-value is above "
               "`q_max` (empty for `regression`).", "str"),
        Column("predicted", "as target", "Forecast value (climatology: the reference mean).",
               "float"),
        Column("lo, hi", "as target", "Prediction interval from the cross-validated RMSE "
               "(Gaussian); climatology: the reference period's empirical range.", "float"),
        Column("p_cold, p_average, p_warm", "1", "Class probabilities under the cut values "
               "(climatology: the reference period's class frequencies).", "float"),
        Column("climatology", "1", "The reference period's class frequencies (cold, average, "
               "warm).", "float"),
        Column("msss_climatology", "1", "Cross-validated skill score of the hindcast against "
               "climatology.", "float"),
        Column("q_value, q_max", "1", "The chosen predictor and lag's q-value in skill.csv, "
               "and the largest allowed (`--outlook-q-max`).", "float"),
        Column("p_beats_persistence, beats_persistence", "1", "Williams' t p-value that the "
               "ice beats persistence, and whether it is below 1 - confidence.", "float"),
        Column("lags_considered", "years", "Lags the hindcast and outlook chose from.", "int"),
        Column("observed, observed_class", "as target", "Present when that year's survey is "
               "already observed.", "float"),
    ),
)

PROJECTION = Table(
    "projection.csv",
    "Output of `coldindex project`: one row per model, scenario, member and year.",
    (
        Column("model", "-", "Climate model.", "str"),
        Column("scenario", "-", "Emission scenario.", "str"),
        Column("member", "-", "Ensemble member (`r1` when the input has none).", "str"),
        Column("year", "-", "Year.", "int"),
        Column("value", "as observed", "Model value as given (or computed from the gridded "
               "fields).", "float"),
        Column("value_adjusted", "as observed", "Bias-adjusted value (areas within [0, domain "
               "area]).", "float"),
        Column("class", "-", "`cold`, `average` or `warm` of the adjusted value under the "
               "observed cut values.", "str"),
        Column("p_cold", "1", "Probability of a cold year from the smooth expected value and "
               "the residual spread (model and scenario, members pooled).", "float"),
        Column("p_warm", "1", "Probability of a warm year (as above).", "float"),
        Column("cold_freq_window", "1", "Share of cold member-years in the window of "
               "`--window` years starting at this year (blank near the end).", "float"),
    ),
)

EMERGENCE = Table(
    "emergence.csv",
    "Output of `coldindex project`: one row per model and scenario, plus an `ensemble "
    "median` row per scenario (models weighted equally).",
    (
        Column("model", "-", "Climate model, or `ensemble median`.", "str"),
        Column("scenario", "-", "Emission scenario.", "str"),
        Column("last_cold_year", "-", "Last year with a cold adjusted value (any member).",
               "int"),
        Column("stop_year", "-", "First year from which P(at least one cold year in the "
               "window), under the fitted AR(1) noise, stays below `--p-stop`; blank unless "
               "`state` is `stopped` (ensemble rows: the median, blank when censored).", "int"),
        Column("stopped", "-", "Whether `state` is `stopped`.", "bool"),
        Column("state", "-", "`stopped`; `not_by_end` (no stop year by the end: right-"
               "censored); `never_cold` (cold years unlikely from the first window on, so no "
               "stop year inside the record: left-censored). Ensemble rows also "
               "`undetermined` (an even split across a censored end).", "str"),
        Column("spread", "as observed", "Marginal SD of the AR(1) year-to-year noise about "
               "the smooth expected value (corrected for what the smoother absorbs).",
               "float"),
        Column("lag1", "1", "Lag-1 autocorrelation of that noise (method of moments through "
               "the smoother's weights).", "float"),
        Column("models", "1", "Ensemble rows: number of models.", "int"),
        Column("models_stopped", "1", "Ensemble rows: models with a stop year.", "int"),
        Column("models_never_cold", "1", "Ensemble rows: models never cold in their record "
               "(counted as earlier than every year in the median).", "int"),
        Column("stop_year_min", "-", "Ensemble rows: earliest model stop year.", "int"),
        Column("stop_year_max", "-", "Ensemble rows: latest model stop year (blank when some "
               "model has none by the end).", "int"),
        Column("calibration_start", "-", "First year of the calibration period.", "int"),
        Column("calibration_end", "-", "Last year of the calibration period.", "int"),
        Column("calibration_years", "1", "Years with both observed and model values in the "
               "calibration period.", "int"),
        Column("short_calibration", "-", "True when fewer than 20 calibration years were "
               "accepted with `--short-calibration`.", "bool"),
    ),
)

COVARIATES = Table(
    "covariates.csv",
    "Output of `coldindex update`: the assessor's covariates, one row a year (every year "
    "from the first to the last, blank where a year has no value). For each chosen index "
    "`<col>` (each of covariates.columns, and with regions each region's copy "
    "`<region>_<col>`): the value, `<col>_sd`, `<col>_lo90`, `<col>_hi90` (when simulated), "
    "`<col>_z` and lagged copies; then each classified column's class probabilities. "
    "Example: to pair a year-class spawned in year Y with the bottom "
    "temperature of its first summer (Y + 1), use the row of year Y + 1 and `bottom_mean_c`; "
    "with the summer before spawning, use the row of year Y + 1 and `bottom_mean_c_lag2`.",
    (
        Column("year", "-", "Year.", "int"),
        Column("<col>", "as indices.csv", "The index.", "float"),
        Column("<col>_sd, <col>_lo90, <col>_hi90", "as indices.csv", "Its simulation SD and "
               "90 % interval.", "float"),
        Column("<col>_z", "1", "Standardized anomaly over the reference period (ddof = 1).",
               "float"),
        Column("<col>_lag<k>, <col>_z_lag<k>", "as above", "The value (and z) of k years "
               "earlier, on the later year's row; aligned by year, never by row.", "float"),
        Column("<col>_p_cold, <col>_p_average, <col>_p_warm", "1", "Class probabilities of "
               "a classified column (classify.columns) given its `_sd`, as in classes.csv.",
               "float"),
    ),
)


def covariates_layout(columns: Sequence[str], lags: Sequence[int],
                      classified: Sequence[str] = ()) -> Table:
    """Layout of ``covariates.csv`` for the chosen columns, lags and classified columns.

    Parameters
    ----------
    columns
        The covariate columns (``covariates.columns``, region copies included).
    lags
        The lags. [years]
    classified
        Columns whose class probabilities are added.

    Returns
    -------
    Table
        The concrete, ordered layout (the template rows of :data:`COVARIATES` expanded).
    """
    cols = [COVARIATES.get("year")]
    for col in columns:
        cols.append(Column(col, "as indices.csv", "The index.", "float"))
        cols += [Column(f"{col}{s}", "as indices.csv", f"Its {m}.", "float")
                 for s, m in _STAT_SUFFIXES.items()]
        cols.append(Column(f"{col}_z", "1", COVARIATES.get("<col>_z").meaning, "float"))
    for col in columns:
        for k in lags:
            cols += [Column(f"{col}_lag{k}", "as indices.csv", f"{col} of {k} years earlier.",
                            "float"),
                     Column(f"{col}_z_lag{k}", "1", f"{col}_z of {k} years earlier.", "float")]
    for col in classified:
        cols += [Column(f"{col}_p_{c}", "1", f"Probability of a {c} year of {col}.", "float")
                 for c in ("cold", "average", "warm")]
    return Table(COVARIATES.name, COVARIATES.description, tuple(cols))

REVISIONS = Table(
    "revisions.csv",
    "Output of `coldindex update`: every past value of indices.csv that changed beyond the "
    "tolerance since the previous release, and every provisional regime shift of the previous "
    "release's shifts.csv that is no longer detected.",
    (
        Column("year", "-", "Year of the value (of a withdrawn shift: its first year).", "int"),
        Column("column", "-", "Column of indices.csv (of a withdrawn shift: the column tested "
               "for shifts).", "str"),
        Column("previous", "as column", "Value in the previous release (of a withdrawn shift: "
               "its step, mean after minus mean before).", "float"),
        Column("current", "as column", "Value now (blank for a withdrawn shift).", "float"),
        Column("change", "as column", "Current minus previous.", "float"),
        Column("cause", "-", "Likely cause read from the two provenance files: that year's "
               "casts changed, parameters changed, tool version changed, domain geometry or "
               "variogram family changed; or `provisional regime shift withdrawn` and the "
               "method.", "str"),
    ),
)

MANIFEST = Table(
    "complete.json",
    "Completion manifest a single command (`check --out`, `index`, `classify`, `shifts`, "
    "`skill`, `project`) writes last into its output folder, after every output replaced "
    "the old one; while it is missing the folder's set of outputs may be incomplete.",
    (
        Column("command", "-", "The command that wrote the set.", "str"),
        Column("version", "-", "coldindex version.", "str"),
        Column("outputs_sha256", "-", "SHA-256 of each output of the set, by file name.",
               "dict"),
    ),
)

OUTPUT_TABLES: tuple[Table, ...] = (QC, indices_table([2.0, 0.0], with_timing=True,
                                                  with_surface=True),
                                    regions_table([2.0, 0.0]),
                                    FIELDS_VARIABLES, CLASSES,
                                    CUTS, SHIFTS, REGIMES, SKILL, HINDCAST, OUTLOOK,
                                    PROJECTION, EMERGENCE, COVARIATES, REVISIONS,
                                    MANIFEST, CASTS_FROM_PROFILES, ICE_FIELDS)
INPUT_TABLES: tuple[Table, ...] = (CASTS, ICE, TRAJECTORIES, PROFILES)

#: The CSV outputs whose layout is fixed, by file name (``casts.csv`` is the casts table
#: made from profiles).
FIXED_CSV_TABLES: dict[str, Table] = {
    t.name: t for t in (QC, CLASSES, SHIFTS, REGIMES, SKILL, HINDCAST, PROJECTION, EMERGENCE,
                        REVISIONS, ICE_FIELDS)}
FIXED_CSV_TABLES["casts.csv"] = CASTS_FROM_PROFILES


def _thresholds_in(columns: Sequence[str]) -> list[float]:
    found: list[float] = []
    for c in columns:
        t = threshold_from_column(c)
        if t is not None and c == area_column(t) and t not in found:
            found.append(t)
    return found


def output_table(name: str, columns: Sequence[str]) -> Table:
    """The declared layout of the CSV output ``name`` for a frame with ``columns``.

    Fixed layouts come from :data:`FIXED_CSV_TABLES`. The layouts that depend on the run
    are built by their functions from what the frame shows: ``indices.csv`` and
    ``regions.csv`` (thresholds from the ``below_<T>c_km2`` columns; simulations,
    survey-day drift and surface columns when present) and ``covariates.csv`` (the
    columns that have a ``_z``, the ``_lag<k>`` lags, the ``_p_cold`` columns).

    Parameters
    ----------
    name
        The file name, e.g. ``qc.csv``.
    columns
        The frame's columns.

    Returns
    -------
    Table
        The layout to write with (see :meth:`Table.conform`).

    Raises
    ------
    ValueError
        ``name`` is no declared CSV output (a programming error).
    """
    import re

    cols = [str(c) for c in columns]
    if name in FIXED_CSV_TABLES:
        return FIXED_CSV_TABLES[name]
    if name == "indices.csv":
        return indices_table(_thresholds_in(cols), with_sims="bottom_mean_c_sd" in cols,
                             with_timing="timing_rate_c_per_day" in cols,
                             with_surface="surface_mean_c" in cols)
    if name == "regions.csv":
        return regions_table(_thresholds_in(cols), with_sims="bottom_mean_c_sd" in cols)
    if name == "covariates.csv":
        chosen = [c for c in cols if f"{c}_z" in cols and c != "year"]
        lags = sorted({int(m.group(1)) for c in cols if (m := re.search(r"_lag(\d+)$", c))})
        classified = [c.removesuffix("_p_cold") for c in cols if c.endswith("_p_cold")]
        return covariates_layout(chosen, lags, classified)
    known = ", ".join([*FIXED_CSV_TABLES, "indices.csv", "regions.csv", "covariates.csv"])
    raise ValueError(f"{name} is not a declared CSV output (declared: {known}); declare its "
                     "table in coldindex/schema.py.")


def _render_table(table: Table) -> list[str]:
    lines = [f"## `{table.name}`", "", table.description, "",
             "| column | unit | meaning |", "|---|---|---|"]
    for c in table.columns:
        req = " (required)" if c.required else ""
        lines.append(f"| `{c.name}`{req} | {c.unit} | {c.meaning} |")
    lines.append("")
    return lines


def render_outputs_md(tables: Iterable[Table] | None = None) -> str:
    """Render the Markdown page documenting every input and output table.

    Returns
    -------
    str
        The content of ``docs/outputs.md``.
    """
    lines = [
        "# Inputs and outputs",
        "",
        "<!-- Generated by `python -m coldindex.schema > docs/outputs.md`; do not edit. -->",
        "",
        "Units: `degC` degrees Celsius (ITS-90), `km2` square kilometres, `1` dimensionless. "
        "Thresholds appear in column names in their shortest form: minus is written `m` and "
        "the decimal point `p` (`below_2c_km2`, `below_m1c_km2`, `below_1p5c_km2`). "
        "The example below uses the default thresholds 2 and 0 °C.",
        "",
    ]
    for t in tables if tables is not None else (*INPUT_TABLES, *OUTPUT_TABLES):
        lines += _render_table(t)
    lines += ["## Quality-control flags", "", "| flag | meaning |", "|---|---|"]
    lines += [f"| `{k}` | {v} |" for k, v in QC_FLAGS.items()]
    lines.append("")
    return "\n".join(lines)


if __name__ == "__main__":  # pragma: no cover
    sys.stdout.write(render_outputs_md())


def numeric_column(raw: Any, col: str, source: str, *, whole: bool = False,
                   allow_blank: bool = False) -> Any:
    """Parse a string column (with a ``row`` column beside it) as numbers, or refuse it.

    Parameters
    ----------
    raw
        Frame of strings as read, with ``row`` (the row as a spreadsheet shows it).
    col
        Column to parse.
    source
        File name for the message.
    whole
        Require whole numbers (years, months).
    allow_blank
        Let blanks through as NaN.

    Returns
    -------
    pandas.Series
        The numbers (float).
    """
    import pandas as pd

    from coldindex.errors import InputError

    text = raw[col].astype(str).str.strip()
    vals = pd.to_numeric(text.where(text != ""), errors="coerce")
    blank = text.eq("")
    bad = (vals.isna() & ~blank) | ~np.isfinite(vals.fillna(0.0))
    if not allow_blank:
        bad |= blank
    if whole:
        bad |= vals.notna() & (vals != vals.round())
    if bad.any():
        r = raw.loc[bad, "row"].iloc[0]
        raise InputError(f"{source}, row {r}: column {col!r} needs "
                         f"{'a whole number' if whole else 'a number'}, got: "
                         f"{raw.loc[bad, col].iloc[0]!r}.")
    return vals.astype(float)


def threshold_from_column(column: str) -> float | None:
    """Inverse of :func:`area_column`: ``below_1p5c_km2`` -> 1.5; None for other names."""
    import re

    m = re.fullmatch(r"below_(m?)(\d+)(?:p(\d+))?c_km2(?:_map)?", column)
    if not m:
        return None
    text = m.group(2) + (f".{m.group(3)}" if m.group(3) else "")
    return -float(text) if m.group(1) else float(text)
