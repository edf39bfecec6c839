"""The command line: parses options, calls the pipeline, prints, maps errors to exit codes.

Every user-facing failure ends with one sentence on stderr and a non-zero exit
code; no traceback is shown for them.
"""

from __future__ import annotations

import functools
from collections.abc import Callable
from pathlib import Path
from typing import Annotated, Any, TypeVar

import pandas as pd
import typer
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn
from rich.table import Table

from coldindex._version import __version__
from coldindex.config import IndexOptions, parse_column_map
from coldindex.errors import ColdindexError

app = typer.Typer(add_completion=False, no_args_is_help=True,
                  help="Cold-pool and bottom-temperature indicators from survey casts. "
                       "Decision support: defer to the responsible agency's reviewed "
                       "assessment.")
out_console = Console()
err_console = Console(stderr=True)
F = TypeVar("F", bound=Callable[..., Any])


def _guard(func: F) -> F:
    """Turn ColdindexError (and a few OS errors) into one line and an exit code."""

    @functools.wraps(func)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        try:
            return func(*args, **kwargs)
        except ColdindexError as exc:
            err_console.print(f"[bold red]Error:[/] {exc}", highlight=False, soft_wrap=True)
            raise typer.Exit(exc.exit_code) from None
        except PermissionError as exc:
            err_console.print(f"[bold red]Error:[/] permission denied for {exc.filename}; "
                              "choose a location you can write to.", highlight=False)
            raise typer.Exit(3) from None
        except KeyboardInterrupt:
            err_console.print("Interrupted; no partial output was left behind.")
            raise typer.Exit(130) from None

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
    try:
        values = tuple(float(v) for v in text.split(",") if v.strip())
    except ValueError:
        raise typer.BadParameter(f"needs numbers separated by commas, got: {text!r}") from None
    if not values:
        raise typer.BadParameter("needs at least one threshold")
    return values


ColumnsOpt = Annotated[str | None, typer.Option(
    "--columns", help="Map your headers to ours: ours=theirs,... e.g. "
    "year=Yr,bottom_c=TempBottom.")]
DomainOpt = Annotated[Path | None, typer.Option(
    "--domain", help="Domain polygon (GeoJSON, lon/lat). Without it a domain is derived from "
    "the stations sampled in most years, written out, and reused next time.")]


def _doy_text(doy: float) -> str:
    if pd.isna(doy):
        return "-"
    date = pd.Timestamp("2001-01-01") + pd.Timedelta(days=float(doy) - 1)
    return f"{date:%d %b}"


@app.command()
@_guard
def check(
    casts: Annotated[Path, typer.Argument(help="Casts file (CSV or Parquet).")],
    domain: DomainOpt = None,
    columns: ColumnsOpt = None,
    out: Annotated[Path | None, typer.Option(
        "--out", help="Folder for qc.csv (every input row with its flag).")] = None,
    min_casts: Annotated[int, typer.Option(help="Casts a year needs to be usable.")] = 30,
    show: Annotated[int, typer.Option(help="Flagged rows to list (0 = none).")] = 40,
) -> None:
    """Read casts, run quality control, and print a per-year summary."""
    from coldindex.io.writers import prepare_out_dir, write_csv
    from coldindex.pipeline import run_check

    if out is not None:
        prepare_out_dir(out)
    run = run_check(casts, parse_column_map(columns), domain)
    qc = run.qc
    counts = qc.counts_by_year()
    reasons = [c for c in counts.columns if c not in ("ok", "median_doy")]
    table = Table(title=f"Quality control of {casts}", title_justify="left")
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
            ft.add_row(str(r["row"]), str(r["year"]), str(r["station"]), r["flag"],
                       r["detail"])
        out_console.print(ft)
        if len(flagged) > show:
            out_console.print(f"... {len(flagged) - show} more; write them all with --out.")
    if out is not None:
        path = write_csv(qc.table.drop(columns=["doy"]), out / "qc.csv")
        out_console.print(f"Wrote {path}")
    if (counts["ok"] >= min_casts).sum() == 0:
        err_console.print(f"[bold red]Error:[/] no year of {casts} has {min_casts} usable "
                          "casts; fix the flagged rows or lower --min-casts.")
        raise typer.Exit(2)


@app.command()
@_guard
def index(
    casts: Annotated[Path, typer.Argument(help="Casts file (CSV or Parquet).")],
    out: Annotated[Path, typer.Option("--out", help="Output folder.")],
    domain: DomainOpt = None,
    grid_km: Annotated[float, typer.Option(help="Grid cell side in km.")] = 5.0,
    thresholds: Annotated[str, typer.Option(help="Thresholds in °C, comma separated.")] = "2,0",
    sims: Annotated[int, typer.Option(help="Conditional simulations a year (0 = off).")] = 200,
    seed: Annotated[int, typer.Option(help="Base random seed.")] = IndexOptions.seed,
    min_casts: Annotated[int, typer.Option(help="Fewest casts for a year's indices.")] = 30,
    min_coverage: Annotated[float, typer.Option(
        help="Lowest share of the domain within 1.5 station spacings of a cast.")] = 0.75,
    method: Annotated[str, typer.Option(help="kriging or idw.")] = "kriging",
    variogram: Annotated[str, typer.Option(
        help="exponential, spherical, matern, gaussian, or auto (chosen by pooled "
             "cross-validation, then frozen).")] = "auto",
    per_year_family: Annotated[bool, typer.Option(
        help="Opt in: choose the variogram family separately each year.")] = False,
    bathymetry: Annotated[Path | None, typer.Option(
        help="Bathymetry NetCDF used as external drift.")] = None,
    columns: ColumnsOpt = None,
) -> None:
    """Map bottom temperature each year and compute cold-water areas with uncertainty."""
    from coldindex.config import ConfigError
    from coldindex.pipeline import run_index

    try:
        opts = IndexOptions(thresholds=_thresholds(thresholds), grid_km=grid_km, sims=sims,
                            seed=seed, min_casts=min_casts, min_coverage=min_coverage,
                            method=method, variogram=variogram,
                            per_year_family=per_year_family)
    except ConfigError as exc:
        raise ConfigError(str(exc).replace("index.", "--").replace("_", "-")) from None
    progress = Progress(TextColumn("[bold]Mapping survey years"), BarColumn(),
                        MofNCompleteColumn(), TextColumn("{task.description}"),
                        TimeElapsedColumn(), console=err_console, transient=True)
    with progress:
        task = progress.add_task("", total=None)
        run = run_index(casts, out, opts, parse_column_map(columns), domain, bathymetry,
                        progress=lambda yr: progress.update(task, advance=1,
                                                            description=str(yr)),
                        on_start=lambda n: progress.update(task, total=n))
    res = run.result
    flagged = int((run.check.qc.table["flag"] != "ok").sum())
    out_console.print(f"{len(res.years)} years, {len(run.check.qc.casts)} casts used, "
                      f"{flagged} flagged (see qc.csv). Domain: {run.check.domain_source}.")
    if res.family_scores:
        scores = ", ".join(f"{k} {v:.3f}" for k, v in res.family_scores.items())
        out_console.print(f"Variogram family {res.family} chosen by pooled leave-one-out RMSE "
                          f"(°C): {scores}; frozen for the next run.")
    for note in run.notes:
        out_console.print(f"Note: {note}.")
    skipped = res.table[res.table["note"].fillna("").str.startswith("no indices")]
    for _, r in skipped.iterrows():
        out_console.print(f"[yellow]{int(r['year'])}[/]: {r['note']}.")
    for p in run.written:
        out_console.print(f"Wrote {p}")


@app.command()
@_guard
def demo(
    folder: Annotated[Path, typer.Argument(help="Folder for the demo.")] = Path(
        "coldindex-demo"),
    sims: Annotated[int, typer.Option(help="Conditional simulations a year.")] = 200,
) -> None:
    """Write the invented sample inputs to DIR/inputs and compute the release in DIR/release."""
    from coldindex.demo import write_scenario
    from coldindex.io.writers import prepare_out_dir

    prepare_out_dir(folder)
    inputs = folder / "inputs"
    write_scenario(inputs)
    out_console.print(f"Wrote the invented inputs to {inputs}")
    index(inputs / "casts.csv", out=folder / "release", domain=inputs / "domain.geojson",
          bathymetry=inputs / "bathymetry.nc", sims=sims)


def main() -> None:
    """Console-script entry point."""
    app()


if __name__ == "__main__":  # pragma: no cover
    main()
