"""The command line: parses options, calls the pipeline, prints, maps errors to exit codes.

Every user-facing failure ends with one sentence on stderr and a non-zero exit
code; no traceback is shown for them.
"""

from __future__ import annotations

import functools
from collections.abc import Callable
from pathlib import Path
from typing import Annotated, Any, TypeVar

import click
import pandas as pd
import typer
from rich.console import Console
from rich.markup import escape
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn
from rich.table import Table
from rich.text import Text

from coldindex._version import __version__
from coldindex.config import IndexOptions, parse_column_map
from coldindex.errors import ColdindexError

app = typer.Typer(add_completion=False, no_args_is_help=True,
                  help="Cold-pool and bottom-temperature indicators from survey casts. "
                       "Decision support: defer to the responsible agency's reviewed "
                       "assessment. Methods, outputs and every command are documented in "
                       "docs/methods.md, docs/outputs.md and docs/cli.md of the source "
                       "distribution.")


class PlainConsole(Console):
    """A console that prints strings as plain text, never as rich markup.

    Messages carry file, column, model and station names; ``[extra]``, ``Temp[red]C``
    or ``[/x]`` in them must print as written. Style a message with
    :class:`rich.text.Text`; tables still read markup in the cells the CLI builds
    (escape data put into them with :func:`rich.markup.escape`).
    """

    def print(self, *objects: Any, markup: bool | None = None, **kwargs: Any) -> None:
        """Print like :meth:`rich.console.Console.print`, strings without markup."""
        if markup is None and any(isinstance(o, str) for o in objects):
            markup = False
        super().print(*objects, markup=markup, **kwargs)


out_console = PlainConsole()
err_console = PlainConsole(stderr=True)
F = TypeVar("F", bound=Callable[..., Any])


def _error(message: str) -> None:
    """Print one error sentence on stderr, on one line, as plain text."""
    err_console.print(Text.assemble(("Error:", "bold red"), " ", " ".join(message.split())),
                      soft_wrap=True, highlight=False)


def _guard(func: F) -> F:
    """Turn every failure into one sentence on stderr and a non-zero exit code.

    Exit codes: 2 bad input or settings, 3 an output cannot be written (disk full,
    read-only, permission), 4 another update holds the folder, 5 out of memory or
    an unforeseen failure, 130 interrupted. No traceback is shown.
    """

    @functools.wraps(func)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        from coldindex.errors import os_error_sentence

        command = func.__name__
        try:
            return func(*args, **kwargs)
        except (typer.Exit, click.exceptions.ClickException, click.exceptions.Abort):
            raise
        except ColdindexError as exc:
            _error(str(exc))
            raise typer.Exit(exc.exit_code) from None
        except MemoryError:
            _error(f"coldindex {command} ran out of memory; use a coarser --grid-km, fewer "
                   "simulations or thresholds, or a larger machine (no output was replaced).")
            raise typer.Exit(5) from None
        except OSError as exc:
            _error(os_error_sentence(exc, f"coldindex {command}: accessing").rstrip(".")
                   + " (no output was replaced).")
            raise typer.Exit(3) from None
        except KeyboardInterrupt:
            _error("Interrupted; no partial output was left behind.")
            raise typer.Exit(130) from None
        except Exception as exc:  # a library error the input checks did not foresee
            text = " ".join(str(exc).split())[:200]
            _error(f"coldindex {command} stopped on an unforeseen {type(exc).__name__}"
                   f"{' (' + text + ')' if text else ''}; no output was replaced; check the "
                   "inputs and settings, or report this together with them.")
            raise typer.Exit(5) from None

    return wrapper  # type: ignore[return-value]


def _version(value: bool) -> None:
    if value:
        out_console.print(f"coldindex {__version__}")
        raise typer.Exit()


@app.callback()
def main_options(
    version: Annotated[bool, typer.Option("--version", callback=_version, is_eager=True,
                                          help="Show the version and exit.")] = False,
) -> None:
    """Cold-pool and bottom-temperature indicators from survey casts."""


def _thresholds(text: str) -> tuple[float, ...]:
    from coldindex.config import ConfigError

    try:
        values = tuple(float(v) for v in text.split(",") if v.strip())
    except ValueError:
        raise ConfigError(f"--thresholds needs numbers separated by commas, got: "
                          f"{text!r}.") from None
    if not values:
        raise ConfigError("--thresholds needs at least one threshold.")
    return values


ColumnsOpt = Annotated[str | None, typer.Option(
    "--columns", help="Map your headers to ours: ours=theirs,... e.g. "
    "year=Yr,bottom_c=TempBottom.")]
DomainOpt = Annotated[Path | None, typer.Option(
    "--domain", help="Domain polygon (GeoJSON, lon/lat). Without it a domain is derived from "
    "the stations sampled in most years, written out, and reused next time.")]


ProfilesOpt = Annotated[Path | None, typer.Option(
    "--profiles", help="Profiles instead of a casts file: CF profile NetCDF (featureType "
    "profile) or a long CSV/Parquet table, one sample a row; casts.csv (one bottom value a "
    "cast, with the sample that made it) is written beside the other outputs.")]
ProfileColumnsOpt = Annotated[str | None, typer.Option(
    "--profile-columns", help="Map the profile table's headers to ours: ours=theirs,... e.g. "
    "cast=CastID,temperature_c=TEMP,pressure_dbar=PRES.")]
MaxGapOpt = Annotated[float, typer.Option(
    "--max-gap-m", help="Profiles: the deepest good sample may lie at most this far above the "
    "sea floor (recorded bottom depth, else --bathymetry).")]
AverageOpt = Annotated[float, typer.Option(
    "--average-m", help="Profiles: average the good samples this far above the deepest "
    "(0 = the deepest alone).")]


def _cast_source(casts: Path | None, profiles: Path | None, columns: str | None,
                 profile_columns: str | None, max_gap_m: float, average_m: float
                 ) -> tuple[Path, dict[str, str], Any]:
    """The casts file or the profiles file, its header map and the profile settings."""
    from coldindex.config import ConfigError, ProfileOptions

    if (casts is None) == (profiles is None):
        raise ConfigError("Give a casts file or --profiles FILE (one of them, not both).")
    if profiles is None:
        assert casts is not None
        if casts.suffix.lower() in (".nc", ".nc4", ".cdf", ".netcdf"):
            raise ConfigError(f"{casts} is NetCDF, not a casts table; give profiles with "
                              f"--profiles {casts}.")
        return casts, parse_column_map(columns), None
    try:
        popts = ProfileOptions(max_gap_m=max_gap_m, average_m=average_m)
    except ConfigError as exc:
        raise ConfigError(str(exc).replace("profiles.", "--").replace("_", "-")) from None
    return profiles, parse_column_map(profile_columns, "--profile-columns"), popts


def _doy_text(doy: float) -> str:
    if pd.isna(doy):
        return "-"
    date = pd.Timestamp("2001-01-01") + pd.Timedelta(days=float(doy) - 1)
    return f"{date:%d %b}"


@app.command()
@_guard
def check(
    casts: Annotated[Path | None, typer.Argument(
        help="Casts file (CSV or Parquet); or give --profiles.")] = None,
    domain: DomainOpt = None,
    columns: ColumnsOpt = None,
    out: Annotated[Path | None, typer.Option(
        "--out", help="Folder for qc.csv (every input row with its flag).")] = None,
    min_casts: Annotated[int, typer.Option(help="Casts a year needs to be usable.")] = 30,
    show: Annotated[int, typer.Option(help="Flagged rows to list (0 = none).")] = 40,
    profiles: ProfilesOpt = None,
    profile_columns: ProfileColumnsOpt = None,
    bathymetry: Annotated[Path | None, typer.Option(
        help="Profiles: bathymetry NetCDF for casts without a recorded bottom depth.")] = None,
    max_gap_m: MaxGapOpt = 10.0,
    average_m: AverageOpt = 0.0,
    outlier_z: Annotated[float, typer.Option(
        help="Spatial-outlier threshold on |z|, the leave-one-out standardized residual from "
             "each year's variogram fit (years with --min-casts casts; 0 = off).")
    ] = IndexOptions.outlier_z,
) -> None:
    """Read casts (or profiles), run quality control, and print a per-year summary."""
    from coldindex.io.writers import plan_outputs, write_csv
    from coldindex.pipeline import PROFILE_CASTS_NAME, run_check

    source, mapping, popts = _cast_source(casts, profiles, columns, profile_columns,
                                          max_gap_m, average_m)
    casts = source
    names = ("qc.csv",) + ((PROFILE_CASTS_NAME,) if popts else ())
    outputs = plan_outputs(out, "check", names, (casts, domain, bathymetry)) if out else None
    from coldindex.config import ConfigError

    try:
        opts = IndexOptions(outlier_z=outlier_z)
    except ConfigError as exc:
        raise ConfigError(str(exc).replace("index.", "--").replace("_", "-")) from None
    run = run_check(casts, mapping, domain, opts, profiles=popts, bathymetry_path=bathymetry,
                    outlier_min_casts=min_casts)
    qc = run.qc
    counts = qc.counts_by_year()
    reasons = [c for c in counts.columns if c not in ("ok", "median_doy")]
    table = Table(title=f"Quality control of {escape(str(casts))}", title_justify="left")
    table.add_column("year", justify="right")
    table.add_column("used", justify="right")
    for r in reasons:
        table.add_column(r.replace("_", " "), justify="right")
    table.add_column("median date", justify="right")
    for yr, row in counts.iterrows():
        usable = row["ok"] >= min_casts
        table.add_row(str(yr) if yr != -1 else "?",
                      f"{int(row['ok'])}" if usable else f"[red]{int(row['ok'])}[/]",
                      *[str(int(row[r])) if row[r] else "" for r in reasons],
                      _doy_text(row["median_doy"]))
    out_console.print(table)
    flagged = qc.table[qc.table["flag"] != "ok"]
    out_console.print(f"Domain: {run.domain_source}. {len(qc.casts)} casts used, "
                      f"{len(flagged)} flagged.")
    if show and len(flagged):
        ft = Table(title="Flagged rows", title_justify="left")
        for c in ("row", "year", "station", "flag", "detail"):
            ft.add_column(c)
        for _, r in flagged.head(show).iterrows():
            ft.add_row(str(r["row"]), escape(str(r["year"])), escape(str(r["station"])),
                       r["flag"], escape(str(r["detail"])))
        out_console.print(ft)
        if len(flagged) > show:
            out_console.print(f"... {len(flagged) - show} more; write them all with --out.")
    if outputs is not None:
        with outputs as o:
            write_csv(qc.table.drop(columns=["doy"]), o.path("qc.csv"))
            if run.profile_casts is not None:
                write_csv(run.profile_casts, o.path(PROFILE_CASTS_NAME))
        for path in outputs.written:
            out_console.print(f"Wrote {path}")
    if (counts["ok"] >= min_casts).sum() == 0:
        _error(f"no year of {casts} has {min_casts} usable casts; fix the flagged rows or "
               "lower --min-casts.")
        raise typer.Exit(2)


@app.command()
@_guard
def index(
    out: Annotated[Path, typer.Option("--out", help="Output folder.")],
    casts: Annotated[Path | None, typer.Argument(
        help="Casts file (CSV or Parquet); or give --profiles.")] = None,
    domain: DomainOpt = None,
    grid_km: Annotated[float, typer.Option(help="Grid cell side in km.")] = 5.0,
    thresholds: Annotated[str, typer.Option(help="Thresholds in °C, comma separated.")] = "2,0",
    sims: Annotated[int, typer.Option(help="Conditional simulations a year (0 = off).")] = 200,
    seed: Annotated[int, typer.Option(help="Base random seed.")] = IndexOptions.seed,
    min_casts: Annotated[int, typer.Option(help="Fewest casts for a year's indices.")] = 30,
    min_coverage: Annotated[float, typer.Option(
        help="Lowest share of the domain within 1.5 reference station spacings of a cast "
             "(the reference spacing is frozen with the domain).")] = 0.75,
    method: Annotated[str, typer.Option(help="kriging or idw.")] = "kriging",
    variogram: Annotated[str, typer.Option(
        help="exponential, spherical, matern, gaussian, or auto (chosen by the pooled "
             "likelihood of the yearly fits, or pooled cross-validation with --fit wls; then "
             "frozen).")] = "auto",
    fit: Annotated[str, typer.Option(
        help="Variogram fit: reml (restricted maximum likelihood, default), ml, or wls "
             "(least squares on the binned variogram, bins weighted by pair counts).")
    ] = IndexOptions.fit,
    param_draws: Annotated[int, typer.Option(
        help="Variogram parameter draws a year shared by the simulations, so the intervals "
             "include the variogram's uncertainty (0 = fitted parameters only).")
    ] = IndexOptions.param_draws,
    per_year_family: Annotated[bool, typer.Option(
        help="Opt in: choose the variogram family separately each year.")] = False,
    bathymetry: Annotated[Path | None, typer.Option(
        help="Bathymetry NetCDF used as external drift.")] = None,
    columns: ColumnsOpt = None,
    regions: Annotated[Path | None, typer.Option(
        help="GeoJSON of named regions (a name property per feature; no overlaps): every "
             "index per region in regions.csv, from the same simulations as the domain's.")
    ] = None,
    depth_zones: Annotated[str, typer.Option(
        help="Depth zones in metres from the bathymetry, e.g. 0-50,50-100,100-200: every "
             "index per zone in regions.csv.")] = "",
    outlier_z: Annotated[float, typer.Option(
        help="Spatial-outlier threshold on |z|, the leave-one-out standardized residual "
             "from the year's fit; flagged casts are kept out of the refit (0 = off).")
    ] = IndexOptions.outlier_z,
    timing_drift: Annotated[bool, typer.Option(
        help="Opt in: the survey day (from each cast's date) as an external drift, alone or "
             "beside the bathymetry; maps and indices are adjusted to --reference-day and the "
             "fitted rate and the adjustment are written per year.")] = False,
    reference_day: Annotated[float, typer.Option(
        help="Day of the survey year the indices are adjusted to with --timing-drift (0 = "
             "the median survey day of the first run, then frozen).")] = 0.0,
    profiles: ProfilesOpt = None,
    profile_columns: ProfileColumnsOpt = None,
    max_gap_m: MaxGapOpt = 10.0,
    average_m: AverageOpt = 0.0,
) -> None:
    """Map bottom temperature each year and compute cold-water areas with uncertainty."""
    from coldindex.config import ConfigError
    from coldindex.pipeline import run_index

    try:
        opts = IndexOptions(thresholds=_thresholds(thresholds), grid_km=grid_km, sims=sims,
                            seed=seed, min_casts=min_casts, min_coverage=min_coverage,
                            method=method, variogram=variogram, fit=fit,
                            param_draws=param_draws, per_year_family=per_year_family,
                            outlier_z=outlier_z, depth_zones=depth_zones,
                            timing_drift=timing_drift, reference_day=reference_day)
    except ConfigError as exc:
        raise ConfigError(str(exc).replace("index.", "--").replace("_", "-")) from None
    source, mapping, popts = _cast_source(casts, profiles, columns, profile_columns,
                                          max_gap_m, average_m)
    progress = Progress(TextColumn("[bold]Mapping survey years"), BarColumn(),
                        MofNCompleteColumn(), TextColumn("{task.description}"),
                        TimeElapsedColumn(), console=err_console, transient=True)
    with progress:
        task = progress.add_task("", total=None)
        run = run_index(source, out, opts, mapping, domain, bathymetry,
                        progress=lambda yr: progress.update(task, advance=1,
                                                            description=str(yr)),
                        on_start=lambda n: progress.update(task, total=n),
                        regions_path=regions, profiles=popts)
    res = run.result
    flagged = int((run.check.qc.table["flag"] != "ok").sum()) + len(res.outliers)
    out_console.print(f"{len(res.years)} years, {len(run.check.qc.casts)} casts used, "
                      f"{flagged} flagged (see qc.csv). Domain: {run.check.domain_source}.")
    if res.family_scores:
        scores = ", ".join(f"{k} {v:.6g}" for k, v in res.family_scores.items())
        how = ("pooled leave-one-out RMSE (°C)" if res.fit_method == "wls"
               else "pooled -2 log-likelihood")
        out_console.print(f"Variogram family {res.family} chosen by {how}: {scores}; frozen "
                          "for the next run.")
    for note in run.notes:
        out_console.print(f"Note: {note}.")
    skipped = res.table[res.table["note"].fillna("").str.startswith("no indices")]
    for _, r in skipped.iterrows():
        out_console.print(f"{int(r['year'])}: {r['note']}.")
    for _, r in res.outliers.iterrows():
        out_console.print(f"{int(r['year'])}: spatial outlier at station {r['station']} "
                          f"(row {int(r['row'])}, z = {r['z']:+.2f}), kept out of the fit.",
                          markup=False)
    for p in run.written:
        out_console.print(f"Wrote {p}")


SeriesArg = Annotated[Path, typer.Argument(help="Yearly series (CSV or Parquet), e.g. "
                                            "indices.csv.")]
ValueOpt = Annotated[str, typer.Option("--value", help="The value column, e.g. bottom_mean_c.")]
OutOpt = Annotated[Path, typer.Option("--out", help="Output folder.")]


def _cuts_for(path: Path, value: str) -> Any:
    """Read a cuts.json and refuse one made for another column."""
    from coldindex.classify import Cuts
    from coldindex.io.readers import read_cuts

    c = Cuts.from_dict(read_cuts(path), str(path))
    if c.column != value:
        raise ColdindexError(f"{path} holds cut values for {c.column!r}, not {value!r}; derive "
                             "new ones or give the matching file.")
    return c


def _cut_values(text: str) -> tuple[float, float]:
    import math

    try:
        low, high = (float(v) for v in text.split(","))
    except ValueError:
        raise ColdindexError(f"--cut-values needs two numbers LOW,HIGH, got: {text!r}.") from None
    if not (math.isfinite(low) and math.isfinite(high) and abs(low) < 1e15
            and abs(high) < 1e15):
        raise ColdindexError(f"--cut-values needs finite numbers LOW,HIGH, got: {text!r}.")
    if low > high:
        raise ColdindexError(f"--cut-values needs LOW <= HIGH, got: {text!r}.")
    return low, high


@app.command()
@_guard
def classify(
    series: SeriesArg,
    value: ValueOpt,
    out: OutOpt,
    cut_values: Annotated[str | None, typer.Option(
        help="Cut values given outright: LOW,HIGH (in the column's unit).")] = None,
    cuts: Annotated[Path | None, typer.Option(
        help="Reuse the cut values of an earlier cuts.json.")] = None,
    rule: Annotated[str, typer.Option(help="tercile or sd:K (mean ± K SD).")] = "tercile",
    reference: Annotated[str | None, typer.Option(
        help="Reference period A-B (default: the whole record).")] = None,
    colder: Annotated[str | None, typer.Option(
        help="lower or higher: which values are colder (default from the column name).")
    ] = None,
    columns: ColumnsOpt = None,
) -> None:
    """Classify each year as cold, average or warm by fixed cut values."""
    from coldindex import classify as cl
    from coldindex.io.readers import read_series
    from coldindex.io.writers import plan_outputs, write_csv, write_json

    if colder is not None and colder not in ("lower", "higher"):
        raise ColdindexError(f"--colder needs to be lower or higher, got: {colder!r}.")
    outputs = plan_outputs(out, "classify", ("classes.csv", "cuts.json"), (series, cuts))
    df = read_series(series, value, parse_column_map(columns))
    ref = cl.parse_reference(reference)
    if cuts is not None:
        c = _cuts_for(cuts, value)
    elif cut_values is not None:
        low, high = _cut_values(cut_values)
        c = cl.Cuts(value, low, high, "given", None, colder or cl.colder_direction(value))
    else:
        c = cl.cuts_by_rule(df["year"], df["value"], value, rule, ref, colder)
    table = cl.classify(df["year"], df["value"], c, df["sd"] if "sd" in df else None, ref)
    t = Table(title=escape(f"{value}: cut values {c.low:.4g} and {c.high:.4g} ({c.rule}, "
                           f"{c.reference or 'whole record'}; {c.direction} is colder)"),
              title_justify="left")
    for col in ("year", "value", "class", "z", *(["p_cold"] if "p_cold" in table else [])):
        t.add_column(col, justify="right")
    colour = {"cold": "blue", "warm": "red", "average": "default", "": "default"}
    for _, r in table.tail(12).iterrows():
        cells = [str(r["year"]), f"{r['value']:.4g}", f"[{colour[r['class']]}]{r['class']}[/]",
                 f"{r['z']:.2f}"]
        if "p_cold" in table:
            cells.append(f"{r['p_cold']:.2f}")
        t.add_row(*cells)
    out_console.print(t)
    counts = table["class"].value_counts()
    out_console.print(", ".join(f"{counts.get(k, 0)} {k}" for k in ("cold", "average", "warm"))
                      + f" years of {len(table)}.")
    with outputs as o:
        write_csv(table, o.path("classes.csv"))
        write_json(c.to_dict(), o.path("cuts.json"))
    for p in outputs.written:
        out_console.print(f"Wrote {p}")


@app.command()
@_guard
def shifts(
    series: SeriesArg,
    value: ValueOpt,
    out: OutOpt,
    method: Annotated[str, typer.Option(help="stars, pelt or both.")] = "both",
    cutoff: Annotated[int, typer.Option(help="STARS cut-off length (years).")] = 10,
    alpha: Annotated[float, typer.Option(
        help="Detection level of STARS itself (the t-test that sets its threshold); the "
             "verdict is --p-max.")] = 0.1,
    p_max: Annotated[float, typer.Option(
        help="Largest family-wise p-value for a shift to survive the red-noise test (both "
             "methods).")] = 0.05,
    huber: Annotated[float, typer.Option(help="STARS Huber weight parameter (SD units).")] = 1.0,
    prewhiten: Annotated[str, typer.Option(help="none, ip4 or mpk.")] = "none",
    subsample: Annotated[int | None, typer.Option(
        help="Subsample length for the prewhitening estimate (default (cutoff + 1) / 3, at "
             "least 5).")] = None,
    min_size: Annotated[int, typer.Option(help="PELT shortest regime (years).")] = 5,
    boot: Annotated[int, typer.Option(help="Red-noise bootstrap replicates (0 = off).")] = 999,
    seed: Annotated[int, typer.Option(help="Random seed of the bootstrap.")] = 20261201,
    null_window: Annotated[int, typer.Option(
        help="Window (years) of the shift-robust lag-1 estimate of the bootstrap null.")] = 15,
    columns: ColumnsOpt = None,
) -> None:
    """Detect regime shifts (STARS, PELT) with red-noise bootstrap p-values."""
    from coldindex.io.readers import read_series
    from coldindex.io.writers import plan_outputs, write_csv
    from coldindex.regimes import ShiftOptions, detect_shifts

    methods = {"both": ("stars", "pelt"), "stars": ("stars",), "pelt": ("pelt",)}
    if method not in methods:
        raise ColdindexError(f"--method needs to be stars, pelt or both, got: {method!r}.")
    if seed < 0:
        raise ColdindexError(f"--seed needs to be a whole number >= 0, got: {seed}.")
    opts = ShiftOptions(cutoff=cutoff, alpha=alpha, huber=huber, prewhiten=prewhiten,
                        subsample=subsample, min_size=min_size, boot=boot, seed=seed,
                        null_window=null_window, p_max=p_max)
    outputs = plan_outputs(out, "shifts", ("shifts.csv", "regimes.csv"), (series,))
    df = read_series(series, value, parse_column_map(columns))
    with err_console.status("Running the red-noise bootstrap..."):
        res = detect_shifts(df["year"], df["value"], methods[method], opts)
    if res.skipped_years:
        out_console.print(f"Years without a value, closed up before detection: "
                          f"{', '.join(map(str, res.skipped_years))}.")
    out_console.print(f"Bootstrap null: AR(1) with lag-1 autocorrelation {res.phi:.2f} "
                      f"(median over {null_window}-year windows, bias-corrected), {boot} "
                      "replicates.")
    t = Table(title=escape(f"Regime shifts in {value}"), title_justify="left")
    for col in ("method", "first year", "mean before", "mean after", "t", "p", "survives",
                "provisional"):
        t.add_column(col, justify="right")
    survives = set(res.surviving().index)
    for i, r in res.shifts.iterrows():
        t.add_row(r["method"], str(r["year"]), f"{r['mean_before']:.4g}",
                  f"{r['mean_after']:.4g}", f"{r['t_stat']:.2f}",
                  "-" if r["p_value"] != r["p_value"] else f"{r['p_value']:.3f}",
                  "[bold]yes[/]" if i in survives else "no",
                  "yes" if r["provisional"] else "")
    out_console.print(t)
    if res.shifts.empty:
        out_console.print("No shift detected.")
    else:
        out_console.print(f"p: family-wise p-value of the red-noise bootstrap; a shift survives "
                          f"when p < {p_max:g} (--p-max).")
    if res.shifts["provisional"].any():
        out_console.print(f"Provisional: fewer than {cutoff} years (--cutoff) of the new regime "
                          "are in the record; the shift may move or vanish as years are added.")
    with outputs as o:
        write_csv(res.shifts, o.path("shifts.csv"))
        write_csv(res.regimes, o.path("regimes.csv"))
    for p in outputs.written:
        out_console.print(f"Wrote {p}")


@app.command()
@_guard
def skill(
    ice: Annotated[Path, typer.Option("--ice", help="Monthly ice file (year, month, ice).")],
    target: Annotated[Path, typer.Option("--target", help="Yearly target series, e.g. "
                                         "indices.csv.")],
    value: ValueOpt,
    out: OutOpt,
    months: Annotated[str, typer.Option(help="Winter months in order, e.g. 11-4 (wraps over "
                                        "the new year) or 5-10.")] = "11-4",
    survey_month: Annotated[int | None, typer.Option(
        help="Month the survey starts (1-12); default: the month of the target's median "
             "survey day (its median_doy column). A winter is labelled with the year of the "
             "first survey that starts after the winter's last month, and lag 0 pairs it "
             "with that survey: a July survey with --months 11-4 puts Nov-Dec of Y in winter "
             "Y+1; a January survey with --months 5-10 puts May-Oct of Y in winter Y+1.",
        min=1, max=12)] = None,
    winter: Annotated[str, typer.Option(help="Winter aggregate: mean or max.")] = "mean",
    lags: Annotated[str, typer.Option(help="Lags in years, e.g. 0-2: lag L pairs a winter "
                                      "with the survey L years after the first survey that "
                                      "follows it (lag 0 = that first survey: the July "
                                      "survey after a Nov-Apr winter, the January survey "
                                      "after a May-Oct winter). The hindcast and outlook "
                                      "choose predictor and lag among these.")] = "0-2",
    outlook_lag: Annotated[int | None, typer.Option(
        help="Use only this lag (one of --lags) for the hindcast and outlook; default: "
             "chosen inside the hindcast folds.", min=0)] = None,
    outlook_q_max: Annotated[float, typer.Option(
        help="Largest q-value the chosen predictor may have; above it, or without positive "
             "cross-validated skill, the outlook is climatological.")] = 0.1,
    confidence: Annotated[float, typer.Option(help="Confidence of intervals.")] = 0.9,
    reference: Annotated[str | None, typer.Option(
        help="Reference period A-B for anomalies, cut values and the climatological "
             "outlook.")] = None,
    cuts: Annotated[Path | None, typer.Option(
        help="cuts.json for the outlook's classes (default: terciles).")] = None,
    leave_out: Annotated[int, typer.Option(
        help="Years left out around each hindcast year (odd; 1 = leave-one-out).")] = 3,
    ice_columns: Annotated[str | None, typer.Option(
        "--ice-columns", help="Map ice headers: ours=theirs,...")] = None,
    target_columns: Annotated[str | None, typer.Option(
        "--target-columns", help="Map target headers: ours=theirs,...")] = None,
    ice_quantity: Annotated[str, typer.Option(
        help="With an ice_fields.csv from coldindex ice: the quantity (area_km2, extent_km2, "
             "volume_km3, mass_gt).")] = "mass_gt",
    ice_region: Annotated[str, typer.Option(
        help="With an ice_fields.csv: the region (empty: the only one).")] = "",
) -> None:
    """Lagged skill of winter ice for the target, the persistence baseline, hindcast, outlook."""
    from coldindex import classify as cl
    from coldindex import skill as sk
    from coldindex.config import ConfigError, check_lags, check_months
    from coldindex.errors import InputError
    from coldindex.io.icefields import read_ice_series
    from coldindex.io.readers import read_series
    from coldindex.io.writers import plan_outputs, write_csv, write_figure, write_json
    from coldindex.report.figures import hindcast_figure, skill_figure

    if not 0 < confidence < 1:
        raise ColdindexError(f"--confidence needs to be in (0, 1), got: {confidence}.")
    check_months(sk.parse_months(months), "--months")
    check_lags(sk.parse_lags(lags), "--lags")
    outputs = plan_outputs(out, "skill", ("skill.csv", "hindcast.csv", "outlook.json",
                                          "skill.png", "hindcast.png"), (ice, target, cuts))
    if cuts is not None:
        _cuts_for(cuts, value)  # a bad cuts file is refused before any work
    try:
        ice_raw = read_ice_series(ice, parse_column_map(ice_columns, "--ice-columns"),
                                  ice_quantity, ice_region)
    except ConfigError as exc:
        raise ConfigError(str(exc).replace("ice_fields.", "--ice-")) from None
    ice_df = sk.ice_frame(ice_raw, str(ice))
    series = read_series(target, value, parse_column_map(target_columns, "--target-columns"),
                         "--target-columns")
    tgt = pd.Series(series["value"].to_numpy(), index=series["year"].to_numpy()).dropna()
    ref = cl.parse_reference(reference)
    doy: pd.Series | None = None
    if survey_month is None:
        try:
            doy = read_series(target, "median_doy", parse_column_map(
                target_columns, "--target-columns"), "--target-columns")["value"]
        except InputError:
            doy = None  # survey_month() says what to do
    survey = sk.survey_month(survey_month, doy)
    out_console.print(f"Winters labelled by the first survey after them (survey month {survey}"
                      f"{'' if survey_month else ', from the median survey day'}).")
    preds = sk.winter_predictors(ice_df, sk.parse_months(months), winter, survey=survey)
    lag_list = sk.parse_lags(lags)
    if cuts is not None:
        c = _cuts_for(cuts, value)
    else:
        c = cl.cuts_by_rule(tgt.index, tgt.to_numpy(), value, "tercile", ref)
    table, hc, ol = sk.skill_and_outlook(preds, tgt, lag_list, c, confidence, ref, leave_out,
                                         outlook_lag, outlook_q_max)

    best = table.sort_values(["q_value", "p_value"]).iloc[0]
    sig = table[table["q_value"] < 0.1]
    if len(sig):
        out_console.print(
            f"Skill: {len(sig)} of {len(table)} month x lag combinations are significant "
            f"(q < 0.1); the strongest is {best['predictor']} at lag {best['lag']} "
            f"(r = {best['r']:.2f}, {confidence:.0%} interval {best['r_lo']:.2f} to "
            f"{best['r_hi']:.2f}, n = {best['n']}, effective n = {best['n_eff']:.1f}, "
            f"q = {best['q_value']:.3f}).")
        beats = best["p_beats_persistence"]
        verdict = ("beats" if beats < 1 - confidence else "does not beat")
        out_console.print(f"Against persistence (r = {best['r_persistence']:.2f}), it "
                          f"{verdict} it (Williams' t, one-sided p = {beats:.3f}).")
    else:
        out_console.print(f"Skill: no month x lag combination is significant (smallest q = "
                          f"{best['q_value']:.2f}); the ice carries no demonstrable skill.")
    out_console.print(f"Hindcast (predictor and lag chosen in each fold from lags "
                      f"{', '.join(map(str, hc.lags))}, most often lag {hc.lag}; "
                      f"leave-{hc.leave_out}-out): anomaly correlation "
                      f"{hc.anomaly_correlation:.2f}, RMSE {hc.rmse:.3g}, skill score "
                      f"{hc.msss_climatology:.2f} against climatology and "
                      f"{hc.msss_persistence:.2f} against persistence.")
    out_console.print("Outlook: " + sk.outlook_sentence(ol, value))
    with outputs as o:
        write_csv(table, o.path("skill.csv"))
        write_csv(hc.table[["year", "observed", "predicted", "persistence"]],
                  o.path("hindcast.csv"))
        write_json(ol, o.path("outlook.json"))
        write_figure(skill_figure(table), o.path("skill.png"))
        write_figure(hindcast_figure(hc.table, ol, value), o.path("hindcast.png"))
    for p in outputs.written:
        out_console.print(f"Wrote {p}")


@app.command()
@_guard
def project(
    trajectories: Annotated[list[Path], typer.Argument(
        help="Trajectory CSV files (model, scenario, year, value[, member]) or gridded "
             "NetCDF files (with --fields).")],
    observed: Annotated[Path, typer.Option("--observed", help="Observed yearly series, e.g. "
                                           "indices.csv.")],
    value: ValueOpt,
    out: OutOpt,
    cuts: Annotated[Path | None, typer.Option(
        help="cuts.json of the observed column (default: terciles of the observed record).")
    ] = None,
    adjust: Annotated[str, typer.Option(help="none, delta, qmap or qdm.")] = "qdm",
    calibration: Annotated[str | None, typer.Option(
        help="Calibration period A-B (default: the overlap of model and observed years; at "
             "least 20 shared years).")
    ] = None,
    short_calibration: Annotated[bool, typer.Option(
        "--short-calibration", help="Accept fewer than 20 calibration years (needs "
        "--calibration; recorded in emergence.csv).")] = False,
    window: Annotated[int, typer.Option(help="Window (years) for the stop year.")] = 10,
    p_stop: Annotated[float, typer.Option(
        help="Cold years have stopped when P(at least one in the window) < this.")] = 0.1,
    units: Annotated[str | None, typer.Option(
        help="Unit of the trajectory values (checked against the observed column).")] = None,
    domain: DomainOpt = None,
    fields: Annotated[Path | None, typer.Option(
        help="Observed fields.nc (gridded path: per-cell adjustment, then areas).")] = None,
    var: Annotated[str | None, typer.Option(help="Variable of the gridded files.")] = None,
    season: Annotated[str, typer.Option(help="Months averaged on the gridded path.")] = "6-8",
    scheduler: Annotated[str | None, typer.Option(
        help="dask.distributed scheduler address (tcp://host:port); default a local one.")
    ] = None,
    observed_columns: Annotated[str | None, typer.Option(
        "--observed-columns", help="Map observed headers: ours=theirs,...")] = None,
    trajectory_columns: Annotated[str | None, typer.Option(
        "--trajectory-columns", help="Map trajectory headers: ours=theirs,...")] = None,
) -> None:
    """When do cold years stop? Bias-adjusted model trajectories under fixed cut values."""
    from coldindex import classify as cl
    from coldindex import project as pj
    from coldindex.io.readers import (
        check_netcdf,
        check_trajectories,
        read_domain,
        read_series,
        read_trajectories,
        refuse_repeated_files,
    )
    from coldindex.io.writers import plan_outputs, write_csv, write_figure
    from coldindex.report.figures import projection_figure

    refuse_repeated_files(trajectories, "TRAJECTORIES")
    if fields is not None:  # the gridded path: every file must open as NetCDF
        for p in (fields, *trajectories):
            check_netcdf(p, "--fields" if p == fields else "TRAJECTORIES")
    outputs = plan_outputs(out, "project", ("projection.csv", "emergence.csv",
                                            "projection.png"),
                           (*trajectories, observed, cuts, domain, fields))
    obs = read_series(observed, value, parse_column_map(observed_columns, "--observed-columns"),
                      "--observed-columns")
    if cuts is not None:
        c = _cuts_for(cuts, value)
    else:
        c = cl.cuts_by_rule(obs["year"], obs["value"], value)
    opts = pj.ProjectOptions(adjust=adjust, calibration=cl.parse_reference(calibration),
                             window=window, p_stop=p_stop, short_calibration=short_calibration)
    bound = None
    if value.startswith("below_"):
        dom_path = domain or (observed.parent / "domain.geojson")
        if not dom_path.is_file():
            raise ColdindexError(f"Areas are bounded by the domain area; give --domain (no "
                                 f"{dom_path} beside the observed series).")
        bound = read_domain(dom_path).area_km2
    if fields is not None:
        from coldindex import gridded

        traj = gridded.trajectories_from_netcdf(trajectories, fields, value, var, season,
                                                adjust, opts.calibration, scheduler)
        opts = pj.ProjectOptions(adjust="none", calibration=opts.calibration, window=window,
                                 p_stop=p_stop, short_calibration=short_calibration,
                                 adjusted_upstream=adjust)
        out_console.print("Gridded path: temperatures adjusted per grid cell against "
                          f"{fields}, then {value} recomputed on the survey grid.")
    else:
        pj.check_units(value, units)
        frames = [pj.trajectory_frame(read_trajectories(
            p, parse_column_map(trajectory_columns, "--trajectory-columns")), str(p))
            for p in trajectories]
        traj = pd.concat(frames, ignore_index=True)
    check_trajectories(traj, ", ".join(map(str, trajectories)))
    res = pj.project(traj, obs["year"], obs["value"], c, opts, bound)
    out_console.print(f"Calibration {res.calibration[0]}-{res.calibration[1]} "
                      f"({res.calibration_years} shared years), adjustment {adjust}; cut values "
                      f"{c.low:.4g} / {c.high:.4g} ({c.rule}).")
    if res.short_calibration:
        out_console.print(f"Caution: the bias adjustment rests on {res.calibration_years} "
                          "calibration years, fewer than 20, accepted with "
                          "--short-calibration (recorded in emergence.csv).")
    for sentence in res.summaries:
        out_console.print(sentence)
    with outputs as o:
        write_csv(res.projection, o.path("projection.csv"))
        write_csv(res.emergence, o.path("emergence.csv"))
        write_figure(projection_figure(res.projection, res.emergence),
                     o.path("projection.png"))
    for p in outputs.written:
        out_console.print(f"Wrote {p}")


@app.command()
@_guard
def ice(
    fields: Annotated[list[Path], typer.Argument(
        help="Gridded ice NetCDF files (CF sea_ice_area_fraction, optional "
             "sea_ice_thickness), daily or monthly, on one grid.")],
    regions: Annotated[Path, typer.Option(
        "--regions", help="GeoJSON of named regions (a name property per feature).")],
    out: OutOpt,
    density_kg_m3: Annotated[float, typer.Option(
        help="Sea-ice density for the mass (kg m-3).")] = 917.0,
    extent_threshold: Annotated[float, typer.Option(
        help="Concentration (fraction) from which a cell counts toward the extent.")] = 0.15,
    thickness: Annotated[str, typer.Option(
        help="auto (read sea_ice_thickness's cell_methods), floe (times concentration) or "
             "cell (already a mean over the cell).")] = "auto",
) -> None:
    """Monthly ice area, extent, volume and mass per region from gridded ice fields.

    Writes ice_fields.csv (year, month, region, quantity, value) and ice_fields.json
    (the inputs, region areas and how thickness was read).
    """
    from coldindex.config import ConfigError, IceFieldsOptions
    from coldindex.sources import run_ice

    try:
        opts = IceFieldsOptions(density_kg_m3=density_kg_m3,
                                extent_threshold=extent_threshold, thickness=thickness)
    except ConfigError as exc:
        raise ConfigError(str(exc).replace("ice_fields.", "--").replace("_", "-")) from None
    res = run_ice(fields, regions, out, opts)
    t = res.table
    for name, r in res.record["regions"].items():
        out_console.print(f"Region {name}: {r['area_km2']:.0f} km² on the grid "
                          f"(polygon {r['region_polygon_km2']:.0f} km²).")
    span = t.sort_values(["year", "month"])
    out_console.print(f"{res.record['time_steps']} time steps into "
                      f"{len(span[['year', 'month']].drop_duplicates())} months "
                      f"({int(span['year'].iloc[0])}-{int(span['month'].iloc[0]):02d} to "
                      f"{int(span['year'].iloc[-1])}-{int(span['month'].iloc[-1]):02d}); "
                      f"thickness: {res.record['thickness'] or 'none'}.")
    for p in res.written:
        out_console.print(f"Wrote {p}")


def _run_update(cfg: Any, out: Path, previous: Path | None) -> None:
    from coldindex.pipeline import UPDATE_STAGES, run_update

    progress = Progress(TextColumn("[bold]Annual update"), BarColumn(), MofNCompleteColumn(),
                        TextColumn("{task.description}"), TimeElapsedColumn(),
                        console=err_console, transient=True)
    with progress:
        task = progress.add_task("", total=len(UPDATE_STAGES))
        seen: list[str] = []

        def on_stage(name: str) -> None:
            if seen:
                progress.update(task, advance=1)
            seen.append(name)
            progress.update(task, description=name)

        run = run_update(cfg, out, previous, on_stage)
    for note in run.notes:
        out_console.print(f"Note: {note}.")
    for h in run.headlines:
        out_console.print(f"- {h}")
    out_console.print(f"Release written to {run.release} (report: {run.release / 'report.html'}).")


@app.command()
@_guard
def update(
    config: Annotated[Path, typer.Argument(help="TOML configuration (see coldindex init).")],
    out: Annotated[Path, typer.Option(
        "--out", help="Folder holding the releases (outside the folders of the inputs).")],
    previous: Annotated[Path | None, typer.Option(
        help="Release to compare with (default: the one OUT/latest names).")] = None,
) -> None:
    """Run every stage into a new release: indices, classes, shifts, skill, projections, report."""
    from coldindex.config import load_config

    cfg = load_config(config)
    _run_update(cfg, out, previous)


@app.command()
@_guard
def init(
    folder: Annotated[Path, typer.Argument(help="Folder for the new coldindex.toml.")],
) -> None:
    """Write a commented configuration template to FOLDER/coldindex.toml."""
    from coldindex.config import TEMPLATE
    from coldindex.errors import OutputError
    from coldindex.io.writers import prepare_out_dir, write_bytes

    prepare_out_dir(folder)
    target = folder / "coldindex.toml"
    if target.exists():
        raise OutputError(f"{target} already exists; remove it or choose another folder.")
    write_bytes(TEMPLATE.encode("utf-8"), target)
    out_console.print(f"Wrote {target}; set inputs.casts and run coldindex update {target}.")


@app.command()
@_guard
def demo(
    folder: Annotated[Path, typer.Argument(help="Folder for the demo.")] = Path(
        "coldindex-demo"),
    sims: Annotated[int, typer.Option(help="Conditional simulations a year.")] = 200,
    boot: Annotated[int, typer.Option(help="Bootstrap replicates of the shift test.")] = 999,
) -> None:
    """Write the invented sample inputs to DIR/inputs and run the whole update into DIR/release.

    The release holds the indices, year classes, regime shifts, the skill of winter
    ice with next summer's outlook, the projections, covariates and report.html.
    """
    import dataclasses

    from coldindex.config import load_config
    from coldindex.demo import write_scenario
    from coldindex.io.writers import prepare_out_dir

    prepare_out_dir(folder)
    inputs = folder / "inputs"
    write_scenario(inputs)
    out_console.print(f"Wrote the invented inputs to {inputs}")
    cfg = load_config(inputs / "coldindex.toml")
    cfg = dataclasses.replace(cfg, index=dataclasses.replace(cfg.index, sims=sims),
                              shifts=dataclasses.replace(cfg.shifts, boot=boot))
    _run_update(cfg, folder / "release", None)


def main() -> None:
    """Console-script entry point."""
    app()


if __name__ == "__main__":  # pragma: no cover
    main()
