"""The yearly update: one validated config, every stage, one atomic release.

The update is the list of the stages' run functions (:mod:`coldindex.pipeline`),
each reading what the stage before wrote into the partial release, so a stage's
files are the same here as from its own command. A stage whose record is too short
(:class:`~coldindex.errors.TooFewDataError`) is skipped with its reason, in the
terminal, ``provenance.json`` and the report; bad input is refused before any work.
Release folders on disk are :mod:`coldindex.io.releases`' business.
"""

from __future__ import annotations

import datetime as dt
import json
import platform
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from coldindex._version import __version__
from coldindex.config import Config
from coldindex.errors import (
    ColdindexError,
    OutputError,
    StageError,
    TooFewDataError,
    os_error_sentence,
)
from coldindex.io import files as io_files
from coldindex.io import readers, releases, writers
from coldindex.io.releases import RELEASE_FORMAT
from coldindex.report.summary import WITHDRAWN_SHIFT


@dataclass
class UpdateRun:
    """Outcome of ``coldindex update``: the release folder and what it says."""

    release: Path
    headlines: list[str]
    notes: list[str] = field(default_factory=list)
    skipped: dict[str, str] = field(default_factory=dict)


def plan(cfg: Config, out: Path, previous: Path | None = None) -> list[str]:
    """Check config, inputs and the output folder; say what the update would run.

    Everything here is fast (no numerical work), so ``update --check`` answers in
    seconds and a full update refuses bad input before its first computation.
    """
    io_files.check_inputs(cfg)
    # The update writes only a new release-<n> folder, the pointer and its lock: inputs
    # may sit inside --out (even inside an older release) but never be one of those.
    releases.check_out_folder(out, {**cfg.inputs.files(), "the config": cfg.source},
                              previous)
    i = cfg.inputs
    lines = [f"check and index: {i.casts or i.profiles} on a {cfg.index.grid_km:g} km grid, "
             f"thresholds {', '.join(f'{t:g}' for t in cfg.index.thresholds)} °C, "
             f"{cfg.index.sims} simulations a year",
             f"classify: {', '.join(cfg.classify.columns)} ({cfg.classify.rule})",
             f"shifts: {cfg.shifts.column} ({cfg.shifts.method}; skipped while the record is "
             f"shorter than {2 * cfg.shifts.cutoff} years)"]
    lines.append(f"skill: {cfg.skill.column} against {i.ice or 'the gridded ice fields'} "
                 f"(skipped below {cfg.skill.min_years} shared years)"
                 if i.ice or i.ice_fields else "skill: not run (no inputs.ice or ice_fields)")
    lines.append(f"project: {cfg.project.column}, {len(i.trajectories)} trajectory file(s), "
                 f"adjustment {cfg.project.adjust} (skipped below 20 calibration years)"
                 if i.trajectories else "project: not run (no inputs.trajectories)")
    lines += ["covariates, revisions, figures and report.html"]
    return lines


def run_update(cfg: Config, out: Path, previous: Path | None = None,
               progress: Callable[[str], None] | None = None,
               execution: Execution | None = None) -> UpdateRun:
    """Run every stage into a new release folder, atomically.

    Paths and settings are checked first (:func:`plan`), before anything is created.
    The update then holds the lock of ``out``, finds and verifies the previous
    release, writes the new one into a private partial folder, renames it to
    ``release-<n>`` when complete and last replaces ``out/latest``. A failure leaves no
    new release and the earlier ones intact.

    Parameters
    ----------
    cfg
        Validated configuration.
    out
        Output folder holding the releases.
    previous
        Release to compare with (default: the one ``out/latest`` names).
    progress
        Called with each stage's name as it starts.
    execution
        Workers and scheduler for the per-year work (no effect on the results).

    Returns
    -------
    UpdateRun
        The release folder, its headline sentences, notes and skipped stages.
    """
    plan(cfg, out, previous)
    with releases.locked(out):
        used = ["indices.csv", "frozen.json", "domain.geojson", "shifts.csv",
                *(f"cuts/{c}.json" for c in cfg.classify.columns)]
        prev, notes = releases.previous_release(out, previous, used)
        n = releases.release_number(out)
        final = out / f"release-{n}"
        tmp = releases.partial_release(out, n)
        stage = ["check"]

        def on_stage(name: str) -> None:
            stage[0] = name
            if progress is not None:
                progress(name)

        try:
            built = _build_release(cfg, tmp, prev, on_stage, execution or Execution())
            releases.publish(tmp, final, out)
        except BaseException as exc:
            releases.discard(tmp)
            if isinstance(exc, (ColdindexError, KeyboardInterrupt, SystemExit)):
                raise
            raise _stage_error(exc, stage[0]) from exc
    return UpdateRun(release=final, headlines=built.headlines, notes=notes + built.notes,
                     skipped=built.skipped)


@dataclass(frozen=True)
class Execution:
    """How the per-year work runs: worker processes or a dask scheduler (results unchanged)."""

    workers: int = 1
    scheduler: str | None = None
    on_progress: Callable[[object], None] | None = None


def _stage_error(exc: BaseException, stage: str) -> ColdindexError:
    """One sentence for an unforeseen failure inside a stage of the update."""
    if isinstance(exc, MemoryError):
        return StageError(f"The {stage} stage of the update ran out of memory; use a coarser "
                          "grid or fewer simulations, or run on a larger machine (no release "
                          "was written).")
    if isinstance(exc, OSError):
        return OutputError(os_error_sentence(exc, f"the {stage} stage, at", exc.filename)
                           .rstrip(".") + " (no release was written).")
    text = str(exc).strip().splitlines()[0][:160] if str(exc).strip() else ""
    return StageError(f"The {stage} stage of the update failed ({type(exc).__name__}"
                      f"{': ' + text if text else ''}); no release was written, check that "
                      "stage's inputs and settings.")


def _versions() -> dict[str, str]:
    import importlib.metadata as md

    out = {"python": platform.python_version()}
    for pkg in ("numpy", "scipy", "pandas", "xarray", "gstools", "matplotlib", "pyproj",
                "shapely", "netCDF4", "pydantic"):
        try:
            out[pkg] = md.version(pkg)
        except md.PackageNotFoundError:  # pragma: no cover
            out[pkg] = "absent"
    return out


def config_record(cfg: Config) -> dict:
    """The configuration as recorded in ``provenance.json``.

    Input paths are relative to the config's folder, so a release does not change with
    the spelling of a path.
    """
    base = cfg.source.parent if cfg.source else Path(".")
    d = cfg.model_dump(mode="json", exclude={"source", "inputs"})
    d["inputs"] = {k: ([io_files.relative_to(x, base) for x in v] if isinstance(v, tuple)
                       else io_files.relative_to(v, base) if v is not None else None)
                   for k, v in cfg.inputs}
    return d


def revisions_table(current: pd.DataFrame, previous: pd.DataFrame | None, cur_prov: dict,
                    prev_prov: dict | None, tolerance: float) -> pd.DataFrame:
    """Every past value that changed beyond ``tolerance`` (relative), with its likely cause."""
    cols = ["year", "column", "previous", "current", "change", "cause"]
    if previous is None or prev_prov is None:
        return pd.DataFrame(columns=cols)
    causes_all = []
    if cur_prov.get("version") != prev_prov.get("version"):
        causes_all.append(f"tool version changed ({prev_prov.get('version')} -> "
                          f"{cur_prov.get('version')})")
    for key in ("variogram_family", "projection"):
        a = (prev_prov.get("frozen") or {}).get(key)
        b = (cur_prov.get("frozen") or {}).get(key)
        if a != b:
            what = "variogram family" if key == "variogram_family" else "domain geometry"
            causes_all.append(f"{what} changed ({a} -> {b})")
    sa = (prev_prov.get("frozen") or {}).get("reference_spacing_km")
    sb = (cur_prov.get("frozen") or {}).get("reference_spacing_km")
    if sa != sb:
        causes_all.append(f"coverage now measured against a frozen reference spacing ({sb} km)"
                          if sa is None else f"coverage reference spacing changed ({sa} -> "
                          f"{sb} km)")
    pa, pb = prev_prov.get("parameters", {}), cur_prov.get("parameters", {})
    # Releases made before the fit method was a parameter were fitted by least squares.
    fa_, fb_ = pa.get("fit", "wls"), pb.get("fit", "wls")
    if fa_ != fb_:
        causes_all.append(f"variogram fit method changed ({fa_} -> {fb_})")
    changed = sorted(k for k in set(pa) | set(pb) if pa.get(k) != pb.get(k) and k != "fit")
    if changed:
        causes_all.append(f"parameters changed ({', '.join(changed)})")
    ha = prev_prov.get("casts_sha256_by_year", {})
    hb = cur_prov.get("casts_sha256_by_year", {})
    rows = []
    p = previous.set_index("year")
    c = current.set_index("year")
    for col in [x for x in c.columns if x in p.columns and x not in ("variogram", "note")]:
        for yr in sorted(set(p.index) & set(c.index)):
            a, b = p.at[yr, col], c.at[yr, col]
            try:
                fa, fb = float(a), float(b)
            except (TypeError, ValueError):
                continue
            if np.isnan(fa) and np.isnan(fb):
                continue
            scale = max(abs(fa), abs(fb), 1e-12)
            if not (np.isnan(fa) or np.isnan(fb)) and abs(fb - fa) <= tolerance * scale:
                continue
            causes = []
            if ha.get(str(yr)) != hb.get(str(yr)):
                causes.append(f"casts of {yr} changed")
            causes += causes_all
            rows.append({"year": int(yr), "column": col, "previous": fa, "current": fb,
                         "change": fb - fa, "cause": "; ".join(causes) or "unexplained"})
    return pd.DataFrame(rows, columns=cols)


def withdrawn_shift_revisions(previous: pd.DataFrame, current: pd.DataFrame,
                              column: str) -> pd.DataFrame:
    """Rows of revisions.csv for the previous release's provisional shifts now gone.

    ``previous`` holds the step (mean after minus mean before) as it was; ``current``
    and ``change`` are blank (:func:`coldindex.regimes.withdrawn_provisional`).
    """
    from coldindex.regimes import withdrawn_provisional

    gone = withdrawn_provisional(previous, current)
    return pd.DataFrame({
        "year": gone["year"].astype(int), "column": column,
        "previous": (gone["mean_after"] - gone["mean_before"]).astype(float),
        "current": np.nan, "change": np.nan,
        "cause": [f"{WITHDRAWN_SHIFT}: {m.upper()} no longer detects a shift starting that "
                  "year" for m in gone["method"]]},
        columns=["year", "column", "previous", "current", "change", "cause"])


@dataclass
class _Built:
    headlines: list[str]
    notes: list[str]
    skipped: dict[str, str]


def _build_release(cfg: Config, rel: Path, prev: Path | None,
                   progress: Callable[[str], None], execution: Execution) -> _Built:
    """Every stage into the partial release ``rel``: the update is this list of calls."""
    from coldindex import classify as cl
    from coldindex import pipeline as pl
    from coldindex.covariates import (
        covariates_table,
        with_class_probabilities,
        with_region_columns,
    )
    from coldindex.report import summary

    notes: list[str] = []
    skipped: dict[str, str] = {}
    written: list[Path] = []

    def write(run: pl.StageRun, **names: str) -> None:
        files = {names.get(k, k): v for k, v in run.files.items()}
        written.extend(writers.write_outputs(rel, files, run.figures, ("svg", "png"),
                                             "figures"))

    def attempt(name: str, call: Callable[[], pl.StageRun]) -> pl.StageRun | None:
        progress(name)
        try:
            return call()
        except TooFewDataError as exc:
            skipped[name] = exc.render()
            return None

    progress("check")
    index = pl.index_release_stage(cfg, rel, prev, execution)
    notes += index.notes
    written += index.written
    table = rel / "indices.csv"  # later stages read the indices as written, like a command

    progress("classify")
    cuts: dict[str, cl.Cuts] = {}
    class_frames = []
    for col in cfg.classify.columns:
        prev_cuts = (prev / "cuts" / f"{col}.json") if prev is not None else None
        old = None
        if prev_cuts is not None and io_files.is_file(prev_cuts):
            old = pl.read_cuts_for(prev_cuts, col)
            if old.rule != cfg.classify.rule or old.reference != (cfg.classify.reference
                                                                   or None):
                old = None
            else:
                notes.append(f"cut values of {col} reused from {prev_cuts}")
        run = pl.run_classify(table, col, cfg.classify, old)
        cuts[col] = run.result
        class_frames.append(run.files.pop("classes.csv").assign(column=col))
        write(run, **{"cuts.json": f"cuts/{col}.json"})
    classes = pd.concat(class_frames, ignore_index=True)
    classes = classes[["column", *[x for x in classes.columns if x != "column"]]]
    written.append(writers.write_table(classes, rel / "classes.csv"))

    sc = cfg.shifts
    shifts = attempt("shifts", lambda: pl.run_shifts(table, sc.column, sc))
    if shifts is not None:
        write(shifts)

    skill = None
    if cfg.inputs.ice is not None or cfg.inputs.ice_fields:
        ice_path = cfg.inputs.ice
        ice_map = cfg.ice_columns
        if cfg.inputs.ice_fields:  # gridded fields -> ice_fields.csv -> the chosen series
            from coldindex.sources import release_ice_series

            progress("skill")
            _, ice_written = release_ice_series(cfg, index.domain, rel)
            written += ice_written
            ice_path = rel / "ice_fields.csv"
            ice_map = {}
        assert ice_path is not None
        kc = cfg.skill
        skill = attempt("skill", lambda: pl.run_skill(
            ice_path, table, kc.column, kc, cfg.ice_fields, cuts.get(kc.column), ice_map))
        if skill is not None:
            write(skill)

    proj = None
    if cfg.inputs.trajectories:
        pc = cfg.project
        proj = attempt("project", lambda: pl.run_project(
            cfg.inputs.trajectories, table, pc.column, pc, cuts.get(pc.column),
            index.domain.area_km2, cfg.trajectory_columns))
        if proj is not None:
            write(proj)

    progress("covariates")
    indices = io_files.read_frame(table)
    cov_source, cov_columns = with_region_columns(indices, index.result.regions,
                                                  cfg.covariates.columns)
    cov = covariates_table(cov_source, cov_columns, cfg.covariates.lags,
                           cfg.covariates.period)
    written.append(writers.write_table(with_class_probabilities(cov, classes),
                                     rel / "covariates.csv"))

    progress("revisions")
    prov = _provenance(cfg, prev, index)
    for stage, reason in skipped.items():
        notes.append(f"{stage} skipped: {reason}")
    prov["skipped"] = skipped
    if proj is not None:
        p = proj.result
        prov["projection_calibration"] = {
            "start": p.calibration[0], "end": p.calibration[1],
            "years": p.calibration_years,
            "short_calibration": p.short_calibration}
    prov = json.loads(json.dumps(prov))  # tuples read back as lists, like the previous one
    prev_prov = releases.read_previous(prev, "provenance.json")
    revisions = revisions_table(indices, releases.read_previous(prev, "indices.csv"),
                                prov, prev_prov, cfg.report.tolerance)
    prev_shifts = releases.read_previous(prev, "shifts.csv")
    if prev_shifts is not None and shifts is not None:
        withdrawn = withdrawn_shift_revisions(prev_shifts, shifts.files["shifts.csv"],
                                              sc.column)
        if len(withdrawn):
            revisions = pd.concat([revisions.astype(withdrawn.dtypes.to_dict()), withdrawn],
                                  ignore_index=True)
    written.append(writers.write_table(revisions, rel / "revisions.csv"))

    progress("figures")
    coast = (readers.read_coastline(cfg.inputs.coastline, index.domain)
             if cfg.inputs.coastline else None)
    figs = summary.release_figures(cfg, indices, classes, shifts, index, coast)
    written += writers.write_outputs(rel, {}, figs, ("svg", "png"), "figures")
    pngs = {name: io_files.read_bytes(rel / "figures" / f"{name}.png")
            for name in (*figs, *(skill.figures if skill else {}),
                         *(proj.figures if proj else {}))}

    progress("report")
    lines = summary.headlines(indices, classes, cuts, shifts, skill, proj, revisions, cfg,
                              skipped)
    page = summary.release_page(cfg, indices, classes, shifts, skill, proj, revisions,
                                index, pngs, lines, prov, skipped, rel.name, cuts)
    written.append(writers.write_bytes(page.encode("utf-8"), rel / "report.html"))
    prov["outputs_sha256"] = {p.relative_to(rel).as_posix(): writers.sha256_file(p)
                              for p in sorted(set(written))}
    prov["created_utc"] = dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds")
    writers.write_json(prov, rel / "provenance.json")
    return _Built(lines, notes, skipped)


def _provenance(cfg: Config, prev: Path | None, index: Any) -> dict:
    """Everything a later release needs to explain its revisions."""
    from coldindex.qc import year_hashes

    # Every input that can move a number (the coastline only draws), by its config name.
    inputs = {key.removeprefix("inputs."): writers.sha256_file(p)
              for key, p in cfg.inputs.files().items() if key != "inputs.coastline"}
    return {"tool": "coldindex", "version": __version__, "release_format": RELEASE_FORMAT,
            "config": config_record(cfg), "parameters": cfg.index.model_dump(mode="json"),
            "inputs_sha256": inputs,
            "casts_sha256_by_year": year_hashes(index.check.qc.table),
            "frozen": index.frozen,
            "previous_release": prev.name if prev is not None else None,
            "versions": _versions()}
