"""The command line: reads flags into the options models, runs a stage, prints, exits.

Every command turns its flags into :mod:`coldindex.config` models first (so a bad
value is refused before any work, naming the flag), calls the stage's run function
in :mod:`coldindex.pipeline` (the same one the yearly update calls), writes the
stage's files through :mod:`coldindex.io.writers` and prints. Every user-facing
failure ends with one sentence on stderr and a non-zero exit code; no traceback.
Heavy libraries are imported inside the commands, so ``--help`` answers at once.
"""

from __future__ import annotations

import functools
import sys
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING, Annotated, Any, TypeVar

import click
import typer
from rich.console import Console
from rich.markup import escape
from rich.text import Text

from coldindex import config as C
from coldindex._version import __version__
from coldindex.config import parse_column_map
from coldindex.errors import ColdindexError, Naming, key_naming

if TYPE_CHECKING:
    from coldindex.pipeline import StageRun

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
# Defaults, shown by --help, come from the options models and from nowhere else.
IX, RD, CL, SH, SK, PJ, PR, IF = (C.IndexOptions(), C.ReadOptions(), C.ClassifyConfig(),
                                  C.ShiftsConfig(), C.SkillConfig(), C.ProjectConfig(),
                                  C.ProfileOptions(), C.IceFieldsOptions())


def _error(message: str) -> None:
    """Print one error sentence on stderr, on one line, as plain text."""
    err_console.print(Text.assemble(("Error:", "bold red"), " ", " ".join(message.split())),
                      soft_wrap=True, highlight=False)


def _guard(naming: Naming = C.flag_naming) -> Callable[[F], F]:
    """Turn every failure into one sentence on stderr and a non-zero exit code.

    Options are named as flags on a single command and as config keys inside
    ``update`` (``naming``). Exit codes: 2 bad input or settings, 3 an output cannot
    be written (disk full, read-only, permission), 4 another update holds the folder,
    5 out of memory or an unforeseen failure, 130 interrupted. No traceback is shown.
    """

    def decorate(func: F) -> F:
        @functools.wraps(func)
        def wrapper(*args: Any, **kwargs: Any) -> Any:
            from coldindex.errors import os_error_sentence

            command = func.__name__
            try:
                return func(*args, **kwargs)
            except (typer.Exit, click.exceptions.ClickException, click.exceptions.Abort):
                raise
            except ColdindexError as exc:
                _error(exc.render(naming))
                raise typer.Exit(exc.exit_code) from None
            except MemoryError:
                _error(f"coldindex {command} ran out of memory; use a coarser grid, fewer "
                       "simulations or thresholds, or a larger machine (no output was "
                       "replaced).")
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
                       f"{' (' + text + ')' if text else ''}; no output was replaced; check "
                       "the inputs and settings, or report this together with them.")
                raise typer.Exit(5) from None

        return wrapper  # type: ignore[return-value]

    return decorate


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


def _h(model: type, key: str, extra: str = "") -> str:
    """The help text of a flag: its option's description in the model."""
    return (model.model_fields[key].description or "") + extra  # type: ignore[attr-defined]


def _text(values: tuple) -> str:
    return ",".join(f"{v:g}" if isinstance(v, float) else str(v) for v in values)


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
MaxGapOpt = Annotated[float, typer.Option(help=_h(C.ProfileOptions, "max_gap_m"))]
AverageOpt = Annotated[float, typer.Option(help=_h(C.ProfileOptions, "average_m"))]
DecimalOpt = Annotated[str, typer.Option(help=_h(C.ReadOptions, "decimal"))]
DateFormatOpt = Annotated[str, typer.Option(help=_h(C.ReadOptions, "date_format"))]
WorkersOpt = Annotated[int, typer.Option(
    help="Worker processes for the survey years (0 = one a core); the results do not depend "
         "on it.")]
SchedulerOpt = Annotated[str | None, typer.Option(
    help="Run the survey years on a dask.distributed scheduler (tcp://host:port) instead of "
         "local processes; the results do not depend on it.")]
ProgressOpt = Annotated[bool | None, typer.Option(
    "--progress/--no-progress", help="Show progress on stderr (default: when stderr is a "
    "terminal).")]


def _cast_source(casts: Path | None, profiles: Path | None, columns: str | None,
                 profile_columns: str | None, max_gap_m: float, average_m: float
                 ) -> tuple[Path, dict[str, str], Any]:
    """The casts file or the profiles file, its header map and the profile settings."""
    from coldindex.errors import ConfigError

    if (casts is None) == (profiles is None):
        raise ConfigError("Give a casts file or --profiles FILE (one of them, not both).")
    if profiles is None:
        assert casts is not None
        if casts.suffix.lower() in (".nc", ".nc4", ".cdf", ".netcdf"):
            raise ConfigError(f"{casts} is NetCDF, not a casts table; give profiles with "
                              f"--profiles {casts}.")
        return casts, parse_column_map(columns), None
    popts = C.from_flags(C.ProfileOptions, max_gap_m=max_gap_m, average_m=average_m)
    return profiles, parse_column_map(profile_columns, "--profile-columns"), popts


def _doy_text(doy: float) -> str:
    import pandas as pd

    if pd.isna(doy):
        return "-"
    date = pd.Timestamp("2001-01-01") + pd.Timedelta(days=float(doy) - 1)
    return f"{date:%d %b}"


def _show_progress(flag: bool | None) -> bool:
    return sys.stderr.isatty() if flag is None else flag


def _workers(n: int) -> int:
    if n < 0:
        from coldindex.errors import ConfigError

        raise ConfigError(f"--workers needs to be 0 (one a core) or more, got: {n}.")
    from coldindex.parallel import default_workers

    return n or default_workers()


def _inputs(**named: Path | None) -> None:
    """Refuse missing or repeated inputs before importing anything heavy."""
    from coldindex.io.files import check_input_files

    check_input_files({("--" + k.replace("_", "-") if k.islower() else k): p
                       for k, p in named.items() if p is not None})


def _write_stage(out: Path, command: str, run: StageRun, inputs: tuple) -> list[Path]:
    """Write a single command's stage outputs together (all or none replaced)."""
    from coldindex.io.writers import plan_outputs, write_outputs

    names = (*run.files, *(f"{n}.png" for n in run.figures))
    outputs = plan_outputs(out, command, names, inputs)
    with outputs as o:
        write_outputs(o.dir, run.files, run.figures)
    return list(outputs.written)


def _wrote(paths: list[Path]) -> None:
    for p in paths:
        out_console.print(f"Wrote {p}")


@app.command()
@_guard()
def check(
    casts: Annotated[Path | None, typer.Argument(
        help="Casts file (CSV or Parquet); or give --profiles.")] = None,
    domain: DomainOpt = None,
    columns: ColumnsOpt = None,
    out: Annotated[Path | None, typer.Option(
        "--out", help="Folder for qc.csv (every input row with its flag).")] = None,
    min_casts: Annotated[int, typer.Option(help=_h(C.IndexOptions, "min_casts"))
                         ] = IX.min_casts,
    show: Annotated[int, typer.Option(help="Flagged rows to list (0 = none).")] = 40,
    profiles: ProfilesOpt = None,
    profile_columns: ProfileColumnsOpt = None,
    bathymetry: Annotated[Path | None, typer.Option(
        help="Profiles: bathymetry NetCDF for casts without a recorded bottom depth.")] = None,
    max_gap_m: MaxGapOpt = PR.max_gap_m,
    average_m: AverageOpt = PR.average_m,
    outlier_z: Annotated[float, typer.Option(help=_h(C.IndexOptions, "outlier_z"))
                         ] = IX.outlier_z,
    decimal: DecimalOpt = RD.decimal,
    date_format: DateFormatOpt = RD.date_format,
) -> None:
    """Read casts (or profiles), run quality control, and print a per-year summary."""
    opts = C.from_flags(C.IndexOptions, outlier_z=outlier_z, min_casts=min_casts)
    read = C.from_flags(C.ReadOptions, decimal=decimal, date_format=date_format)
    source, mapping, popts = _cast_source(casts, profiles, columns, profile_columns,
                                          max_gap_m, average_m)
    _inputs(CASTS=source, domain=domain, bathymetry=bathymetry)
    from rich.table import Table

    from coldindex.io.writers import plan_outputs, write_table
    from coldindex.pipeline import PROFILE_CASTS_NAME, run_check
    from coldindex.schema import CASTS_FROM_PROFILES

    names = ("qc.csv",) + ((PROFILE_CASTS_NAME,) if popts else ())
    outputs = plan_outputs(out, "check", names, (source, domain, bathymetry)) if out else None
    run = run_check(source, mapping, domain, opts, profiles=popts, bathymetry_path=bathymetry,
                    outlier_min_casts=min_casts, read=read)
    qc = run.qc
    counts = qc.counts_by_year()
    reasons = [c for c in counts.columns if c not in ("ok", "median_doy")]
    table = Table(title=f"Quality control of {escape(str(source))}", title_justify="left")
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
            write_table(qc.table, o.path("qc.csv"))
            if run.profile_casts is not None:
                write_table(run.profile_casts, o.path(PROFILE_CASTS_NAME), CASTS_FROM_PROFILES)
        _wrote(outputs.written)
    if (counts["ok"] >= min_casts).sum() == 0:
        _error(f"no year of {source} has {min_casts} usable casts; fix the flagged rows (see "
               "the table above) or, if the survey is small by design, lower --min-casts.")
        raise typer.Exit(2)


@app.command()
@_guard()
def index(
    out: Annotated[Path, typer.Option("--out", help="Output folder.")],
    casts: Annotated[Path | None, typer.Argument(
        help="Casts file (CSV or Parquet); or give --profiles.")] = None,
    domain: DomainOpt = None,
    grid_km: Annotated[float, typer.Option(help=_h(C.IndexOptions, "grid_km"))] = IX.grid_km,
    thresholds: Annotated[str, typer.Option(help=_h(C.IndexOptions, "thresholds"))
                          ] = _text(IX.thresholds),
    sims: Annotated[int, typer.Option(help=_h(C.IndexOptions, "sims"))] = IX.sims,
    seed: Annotated[int, typer.Option(help=_h(C.IndexOptions, "seed"))] = IX.seed,
    min_casts: Annotated[int, typer.Option(help=_h(C.IndexOptions, "min_casts"))
                         ] = IX.min_casts,
    min_coverage: Annotated[float, typer.Option(help=_h(C.IndexOptions, "min_coverage"))
                            ] = IX.min_coverage,
    method: Annotated[str, typer.Option(help=_h(C.IndexOptions, "method"))] = IX.method,
    variogram: Annotated[str, typer.Option(help=_h(C.IndexOptions, "variogram"))
                         ] = IX.variogram,
    fit: Annotated[str, typer.Option(help=_h(C.IndexOptions, "fit"))] = IX.fit,
    param_draws: Annotated[int, typer.Option(help=_h(C.IndexOptions, "param_draws"))
                           ] = IX.param_draws,
    per_year_family: Annotated[bool, typer.Option(
        help=_h(C.IndexOptions, "per_year_family"))] = IX.per_year_family,
    variogram_params: Annotated[str, typer.Option(
        help=_h(C.IndexOptions, "variogram_params"))] = "",
    bathymetry: Annotated[Path | None, typer.Option(
        help="Bathymetry NetCDF used as external drift.")] = None,
    columns: ColumnsOpt = None,
    regions: Annotated[Path | None, typer.Option(
        help="GeoJSON of named regions (a name property per feature; no overlaps): every "
             "index per region in regions.csv, from the same simulations as the domain's.")
    ] = None,
    depth_zones: Annotated[str, typer.Option(help=_h(C.IndexOptions, "depth_zones"))
                           ] = IX.depth_zones,
    outlier_z: Annotated[float, typer.Option(help=_h(C.IndexOptions, "outlier_z"))
                         ] = IX.outlier_z,
    timing_drift: Annotated[bool, typer.Option(help=_h(C.IndexOptions, "timing_drift"))
                            ] = IX.timing_drift,
    reference_day: Annotated[float, typer.Option(help=_h(C.IndexOptions, "reference_day"))
                             ] = IX.reference_day,
    profiles: ProfilesOpt = None,
    profile_columns: ProfileColumnsOpt = None,
    max_gap_m: MaxGapOpt = PR.max_gap_m,
    average_m: AverageOpt = PR.average_m,
    decimal: DecimalOpt = RD.decimal,
    date_format: DateFormatOpt = RD.date_format,
    workers: WorkersOpt = 0,
    scheduler: SchedulerOpt = None,
    progress: ProgressOpt = None,
) -> None:
    """Map bottom temperature each year and compute cold-water areas with uncertainty."""
    opts = C.from_flags(C.IndexOptions, thresholds=thresholds, grid_km=grid_km, sims=sims,
                        seed=seed, min_casts=min_casts, min_coverage=min_coverage,
                        method=method, variogram=variogram, fit=fit, param_draws=param_draws,
                        per_year_family=per_year_family, outlier_z=outlier_z,
                        variogram_params=variogram_params or None,
                        depth_zones=depth_zones, timing_drift=timing_drift,
                        reference_day=reference_day)
    read = C.from_flags(C.ReadOptions, decimal=decimal, date_format=date_format)
    source, mapping, popts = _cast_source(casts, profiles, columns, profile_columns,
                                          max_gap_m, average_m)
    _inputs(CASTS=source, domain=domain, bathymetry=bathymetry, regions=regions)
    from coldindex.pipeline import run_index

    with _ProgressBar("Mapping survey years", _show_progress(progress)) as bar:
        run = run_index(source, out, opts, mapping, domain, bathymetry,
                        progress=bar.event, regions_path=regions,
                        profiles=popts, read=read, workers=_workers(workers),
                        scheduler=scheduler)
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
    _wrote(run.written)


class _ProgressBar:
    """The stage, items done of total, elapsed and remaining time, on stderr (or nothing)."""

    def __init__(self, title: str, show: bool) -> None:
        self.show, self.title = show, title
        self.bar: Any = None
        self.task: Any = None
        self.clock: Any = None
        self.prefix = ""

    def __enter__(self) -> _ProgressBar:
        if self.show:
            import time

            from rich.progress import BarColumn, Progress, TextColumn

            from coldindex.progress import ProgressClock

            self.clock = ProgressClock(time.monotonic)
            self.bar = Progress(TextColumn(f"[bold]{self.title}"), BarColumn(),
                                TextColumn("{task.description}"), console=err_console,
                                transient=True)
            self.bar.__enter__()
            self.task = self.bar.add_task("", total=None)
        return self

    def __exit__(self, *exc: Any) -> None:
        if self.bar is not None:
            self.bar.__exit__(*exc)

    def event(self, ev: Any) -> None:
        """Show one :class:`coldindex.progress.ProgressEvent` with its times."""
        if self.bar is None:
            return
        st = self.clock.update(ev)
        left = f", about {st.remaining_s:.0f} s left" if st.remaining_s is not None else ""
        year = f" ({ev.year})" if ev.year is not None else ""
        self.bar.update(self.task, total=ev.total, completed=ev.done,
                        description=f"{self.prefix}{st.label} {ev.done}/{ev.total}{year}, "
                                    f"{st.elapsed_s:.0f} s elapsed{left}")

    def stage(self, name: str) -> None:
        """Show the update's stage by name (the per-year events follow inside it)."""
        if self.bar is not None:
            self.prefix = f"{name}: "
            self.bar.update(self.task, description=name)


SeriesArg = Annotated[Path, typer.Argument(help="Yearly series (CSV or Parquet), e.g. "
                                            "indices.csv.")]
ValueOpt = Annotated[str, typer.Option("--value", help="The value column, e.g. bottom_mean_c.")]
OutOpt = Annotated[Path, typer.Option("--out", help="Output folder.")]


@app.command()
@_guard()
def classify(
    series: SeriesArg,
    value: ValueOpt,
    out: OutOpt,
    cut_values: Annotated[str | None, typer.Option(help=_h(C.ClassifyConfig, "cut_values"))
                          ] = None,
    cuts: Annotated[Path | None, typer.Option(
        help="Reuse the cut values of an earlier cuts.json.")] = None,
    rule: Annotated[str, typer.Option(help=_h(C.ClassifyConfig, "rule"))] = CL.rule,
    reference: Annotated[str, typer.Option(help=_h(C.ClassifyConfig, "reference"))
                         ] = CL.reference,
    colder: Annotated[str, typer.Option(help=_h(C.ClassifyConfig, "colder"))] = CL.colder,
    columns: ColumnsOpt = None,
) -> None:
    """Classify each year as cold, average or warm by fixed cut values."""
    opts = C.from_flags(C.ClassifyConfig, columns=value, cut_values=cut_values, rule=rule,
                        reference=reference, colder=colder)
    _inputs(SERIES=series, cuts=cuts)
    from rich.table import Table

    from coldindex.pipeline import read_cuts_for, run_classify

    given = read_cuts_for(cuts, value) if cuts is not None else None
    run = run_classify(series, value, opts, given, parse_column_map(columns))
    c, table = run.result, run.files["classes.csv"]
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
    _wrote(_write_stage(out, "classify", run, (series, cuts)))


@app.command()
@_guard()
def shifts(
    series: SeriesArg,
    value: ValueOpt,
    out: OutOpt,
    method: Annotated[str, typer.Option(help=_h(C.ShiftsConfig, "method"))] = SH.method,
    cutoff: Annotated[int, typer.Option(help=_h(C.ShiftsConfig, "cutoff"))] = SH.cutoff,
    alpha: Annotated[float, typer.Option(help=_h(C.ShiftsConfig, "alpha"))] = SH.alpha,
    p_max: Annotated[float, typer.Option(help=_h(C.ShiftsConfig, "p_max"))] = SH.p_max,
    huber: Annotated[float, typer.Option(help=_h(C.ShiftsConfig, "huber"))] = SH.huber,
    prewhiten: Annotated[str, typer.Option(help=_h(C.ShiftsConfig, "prewhiten"))
                         ] = SH.prewhiten,
    subsample: Annotated[int, typer.Option(help=_h(C.ShiftsConfig, "subsample"))
                         ] = SH.subsample,
    min_size: Annotated[int, typer.Option(help=_h(C.ShiftsConfig, "min_size"))] = SH.min_size,
    boot: Annotated[int, typer.Option(help=_h(C.ShiftsConfig, "boot"))] = SH.boot,
    seed: Annotated[int, typer.Option(help=_h(C.ShiftsConfig, "seed"))] = SH.seed,
    null_window: Annotated[int, typer.Option(help=_h(C.ShiftsConfig, "null_window"))
                           ] = SH.null_window,
    columns: ColumnsOpt = None,
) -> None:
    """Detect regime shifts (STARS, PELT) with red-noise bootstrap p-values."""
    opts = C.from_flags(C.ShiftsConfig, column=value, method=method, cutoff=cutoff,
                        alpha=alpha, p_max=p_max, huber=huber, prewhiten=prewhiten,
                        subsample=subsample, min_size=min_size, boot=boot, seed=seed,
                        null_window=null_window)
    _inputs(SERIES=series)
    from rich.table import Table

    from coldindex.pipeline import run_shifts

    with err_console.status("Running the red-noise bootstrap..."):
        run = run_shifts(series, value, opts, parse_column_map(columns))
    res: Any = run.result
    if res.skipped_years:
        out_console.print(f"Years without a value, closed up before detection: "
                          f"{', '.join(map(str, res.skipped_years))}.")
    out_console.print(f"Bootstrap null: AR(1) with lag-1 autocorrelation {res.phi:.2f} "
                      f"(median over {null_window}-year windows, bias-corrected), {boot} "
                      "replicates.")
    t = Table(title=escape(f"Regime shifts in {value}"), title_justify="left")
    for col in ("method", "first year", "mean before", "mean after", "t local", "t record",
                "p", "survives", "provisional"):
        t.add_column(col, justify="right")
    survives = set(res.surviving().index)
    for i, r in res.shifts.iterrows():
        t.add_row(r["method"], str(r["year"]), f"{r['mean_before']:.4g}",
                  f"{r['mean_after']:.4g}", f"{r['t_stat']:.2f}", f"{r['t_record']:.2f}",
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
    _wrote(_write_stage(out, "shifts", run, (series,)))


@app.command()
@_guard()
def skill(
    ice: Annotated[Path, typer.Option("--ice", help="Monthly ice file (year, month, ice), or "
                                      "the ice_fields.csv of coldindex ice.")],
    target: Annotated[Path, typer.Option("--target", help="Yearly target series, e.g. "
                                         "indices.csv.")],
    value: ValueOpt,
    out: OutOpt,
    months: Annotated[str, typer.Option(help=_h(C.SkillConfig, "months"))] = SK.months,
    survey_month: Annotated[int, typer.Option(help=_h(C.SkillConfig, "survey_month"))
                            ] = SK.survey_month,
    winter: Annotated[str, typer.Option(help=_h(C.SkillConfig, "winter"))] = SK.winter,
    lags: Annotated[str, typer.Option(help=_h(C.SkillConfig, "lags"))] = SK.lags,
    outlook_lag: Annotated[int, typer.Option(help=_h(C.SkillConfig, "outlook_lag"))
                           ] = SK.outlook_lag,
    outlook_q_max: Annotated[float, typer.Option(help=_h(C.SkillConfig, "outlook_q_max"))
                             ] = SK.outlook_q_max,
    confidence: Annotated[float, typer.Option(help=_h(C.SkillConfig, "confidence"))
                          ] = SK.confidence,
    reference: Annotated[str, typer.Option(help=_h(C.SkillConfig, "reference"))
                         ] = SK.reference,
    cuts: Annotated[Path | None, typer.Option(
        help="cuts.json for the outlook's classes (default: terciles).")] = None,
    leave_out: Annotated[int, typer.Option(help=_h(C.SkillConfig, "leave_out"))
                         ] = SK.leave_out,
    ice_columns: Annotated[str | None, typer.Option(
        "--ice-columns", help="Map ice headers: ours=theirs,...")] = None,
    target_columns: Annotated[str | None, typer.Option(
        "--target-columns", help="Map target headers: ours=theirs,...")] = None,
    ice_quantity: Annotated[str, typer.Option(help=_h(C.IceFieldsOptions, "quantity"))
                            ] = IF.quantity,
    ice_region: Annotated[str, typer.Option(help=_h(C.IceFieldsOptions, "region"))
                          ] = IF.region,
) -> None:
    """Lagged skill of winter ice for the target, the persistence baseline, hindcast, outlook."""
    opts = C.from_flags(C.SkillConfig, column=value, months=months, survey_month=survey_month,
                        winter=winter, lags=lags, outlook_lag=outlook_lag,
                        outlook_q_max=outlook_q_max, confidence=confidence,
                        reference=reference, leave_out=leave_out)
    ice_opts = C.from_flags(C.IceFieldsOptions, quantity=ice_quantity, region=ice_region)
    _inputs(ice=ice, target=target, cuts=cuts)
    from coldindex.pipeline import read_cuts_for, run_skill
    from coldindex.report.text import skill_lines

    given = read_cuts_for(cuts, value) if cuts is not None else None
    run = run_skill(ice, target, value, opts, ice_opts, given,
                    parse_column_map(ice_columns, "--ice-columns"),
                    parse_column_map(target_columns, "--target-columns"))
    for line in skill_lines(run.result, value, opts, flag=True):
        out_console.print(line)
    _wrote(_write_stage(out, "skill", run, (ice, target, cuts)))


@app.command()
@_guard()
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
    adjust: Annotated[str, typer.Option(help=_h(C.ProjectConfig, "adjust"))] = PJ.adjust,
    calibration: Annotated[str, typer.Option(help=_h(C.ProjectConfig, "calibration"))
                           ] = PJ.calibration,
    short_calibration: Annotated[bool, typer.Option(
        "--short-calibration", help=_h(C.ProjectConfig, "short_calibration"))
    ] = PJ.short_calibration,
    window: Annotated[int, typer.Option(help=_h(C.ProjectConfig, "window"))] = PJ.window,
    p_stop: Annotated[float, typer.Option(help=_h(C.ProjectConfig, "p_stop"))] = PJ.p_stop,
    units: Annotated[str, typer.Option(help=_h(C.ProjectConfig, "units"))] = PJ.units,
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
    opts = C.from_flags(C.ProjectConfig, column=value, adjust=adjust, calibration=calibration,
                        short_calibration=short_calibration, window=window, p_stop=p_stop,
                        units=units)
    _inputs(observed=observed, cuts=cuts, domain=domain,
            **{f"TRAJECTORIES[{k}]": p for k, p in enumerate(trajectories)})
    from coldindex.io.readers import check_netcdf, read_domain
    from coldindex.pipeline import GriddedSource, read_cuts_for, run_project

    gridded = None
    if fields is not None:  # the gridded path: every file must open as NetCDF
        for p in (fields, *trajectories):
            check_netcdf(p, "--fields" if p == fields else "TRAJECTORIES")
        gridded = GriddedSource(fields, var, season, scheduler)
    given = read_cuts_for(cuts, value) if cuts is not None else None
    area = None
    if value.startswith("below_"):
        from coldindex.io.files import is_file

        dom_path = domain or (observed.parent / "domain.geojson")
        if not is_file(dom_path):
            raise ColdindexError(f"Areas are bounded by the domain area; give --domain (no "
                                 f"{dom_path} beside the observed series).")
        area = read_domain(dom_path).area_km2
    run = run_project(trajectories, observed, value, opts, given, area,
                      parse_column_map(trajectory_columns, "--trajectory-columns"),
                      parse_column_map(observed_columns, "--observed-columns"), gridded)
    res: Any = run.result
    if gridded is not None:
        out_console.print("Gridded path: temperatures adjusted per grid cell against "
                          f"{fields}, then {value} recomputed on the survey grid.")
    c = run.cuts
    out_console.print(f"Calibration {res.calibration[0]}-{res.calibration[1]} "
                      f"({res.calibration_years} shared years), adjustment {adjust}"
                      + (f"; cut values {c.low:.4g} / {c.high:.4g} ({c.rule})." if c else "."))
    if res.short_calibration:
        out_console.print(f"Caution: the bias adjustment rests on {res.calibration_years} "
                          "calibration years, fewer than 20, accepted with "
                          "--short-calibration (recorded in emergence.csv).")
    for sentence in res.summaries:
        out_console.print(sentence)
    run.figures.pop("stop_years", None)
    _wrote(_write_stage(out, "project", run, (*trajectories, observed, cuts, domain, fields)))


@app.command()
@_guard()
def ice(
    fields: Annotated[list[Path], typer.Argument(
        help="Gridded ice NetCDF files (CF sea_ice_area_fraction, optional "
             "sea_ice_thickness), daily or monthly, on one grid.")],
    regions: Annotated[Path, typer.Option(
        "--regions", help="GeoJSON of named regions (a name property per feature).")],
    out: OutOpt,
    density_kg_m3: Annotated[float, typer.Option(help=_h(C.IceFieldsOptions, "density_kg_m3"))
                             ] = IF.density_kg_m3,
    extent_threshold: Annotated[float, typer.Option(
        help=_h(C.IceFieldsOptions, "extent_threshold"))] = IF.extent_threshold,
    thickness: Annotated[str, typer.Option(help=_h(C.IceFieldsOptions, "thickness"))
                         ] = IF.thickness,
) -> None:
    """Monthly ice area, extent, volume and mass per region from gridded ice fields.

    Writes ice_fields.csv (year, month, region, quantity, value) and ice_fields.json
    (the inputs, region areas and how thickness was read).
    """
    opts = C.from_flags(C.IceFieldsOptions, density_kg_m3=density_kg_m3,
                        extent_threshold=extent_threshold, thickness=thickness)
    _inputs(regions=regions, **{f"FIELDS[{k}]": p for k, p in enumerate(fields)})
    from coldindex.sources import run_ice

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
    _wrote(res.written)


def _run_update(cfg: Any, out: Path, previous: Path | None, workers: int,
                scheduler: str | None, progress: bool | None) -> None:
    from coldindex.release import Execution, run_update

    with _ProgressBar("Annual update", _show_progress(progress)) as bar:
        run = run_update(cfg, out, previous, bar.stage,
                         Execution(workers=_workers(workers), scheduler=scheduler,
                                   on_progress=bar.event))
    for note in run.notes:
        out_console.print(f"Note: {note}.")
    for h in run.headlines:
        out_console.print(f"- {h}")
    out_console.print(f"Release written to {run.release} (report: {run.release / 'report.html'}).")


@app.command()
@_guard(key_naming)
def update(
    config: Annotated[Path, typer.Argument(help="TOML configuration (see coldindex init).")],
    out: Annotated[Path, typer.Option(
        "--out", help="Folder holding the releases (outside the folders of the inputs).")],
    previous: Annotated[Path | None, typer.Option(
        help="Release to compare with (default: the one OUT/latest names).")] = None,
    check_only: Annotated[bool, typer.Option(
        "--check", help="Validate the config and inputs, say what would run, and stop (no "
        "computation, nothing written).")] = False,
    workers: WorkersOpt = 0,
    scheduler: SchedulerOpt = None,
    progress: ProgressOpt = None,
) -> None:
    """Run every stage into a new release: indices, classes, shifts, skill, projections, report."""
    from coldindex.io.files import load_config

    cfg = load_config(config)
    if check_only:
        from coldindex.release import plan

        lines = plan(cfg, out, previous)
        out_console.print(f"{config}: valid; the inputs exist. The update would run:")
        for line in lines:
            out_console.print(f"- {line}")
        return
    _run_update(cfg, out, previous, workers, scheduler, progress)


@app.command()
@_guard()
def init(
    folder: Annotated[Path, typer.Argument(help="Folder for the new coldindex.toml.")],
    casts: Annotated[str, typer.Option(
        help="Path of your casts file, relative to FOLDER.")] = "casts.csv",
    from_demo: Annotated[bool, typer.Option(
        "--from-demo", help="Write the demo's inputs into FOLDER too, and a config that "
        "uses all of them.")] = False,
) -> None:
    """Write a configuration template to FOLDER/coldindex.toml that runs as written."""
    from coldindex.errors import OutputError
    from coldindex.io.writers import prepare_out_dir, write_bytes

    prepare_out_dir(folder)
    target = folder / "coldindex.toml"
    from coldindex.io.files import is_file

    if is_file(target):
        raise OutputError(f"{target} already exists; remove it or choose another folder.")
    if from_demo:
        from coldindex.demo import write_scenario

        write_scenario(folder)  # writes the demo inputs and their coldindex.toml
        out_console.print(f"Wrote the invented demo inputs and {target}; run coldindex update "
                          f"{target} --out RELEASES.")
        return
    write_bytes(C.template(casts).encode("utf-8"), target)
    out_console.print(f"Wrote {target}; it reads {folder / casts}. Check it with: coldindex "
                      f"update {target} --out RELEASES --check")


@app.command()
@_guard(key_naming)
def demo(
    folder: Annotated[Path, typer.Argument(help="Folder for the demo.")] = Path(
        "coldindex-demo"),
    sims: Annotated[int, typer.Option(help=_h(C.IndexOptions, "sims"))] = IX.sims,
    boot: Annotated[int, typer.Option(help=_h(C.ShiftsConfig, "boot"))] = SH.boot,
    workers: WorkersOpt = 0,
    progress: ProgressOpt = None,
) -> None:
    """Write the invented sample inputs to DIR/inputs and run the whole update into DIR/release.

    The release holds the indices, year classes, regime shifts, the skill of winter
    ice with next summer's outlook, the projections, covariates and report.html.
    """
    from coldindex.demo import write_scenario
    from coldindex.io.writers import prepare_out_dir

    prepare_out_dir(folder)
    inputs = folder / "inputs"
    write_scenario(inputs)
    out_console.print(f"Wrote the invented inputs to {inputs}")
    from coldindex.io.files import load_config

    cfg = load_config(inputs / "coldindex.toml").replace(index={"sims": sims},
                                                            shifts={"boot": boot})
    _run_update(cfg, folder / "release", None, workers, None, progress)


def main() -> None:
    """Console-script entry point."""
    app()


if __name__ == "__main__":  # pragma: no cover
    main()
