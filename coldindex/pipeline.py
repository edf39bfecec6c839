"""Runs that tie readers, computation and writers together.

``run_check`` and ``run_index`` serve the single commands; the annual update
(every stage into one release) grows here. Nothing in this module prints: the
CLI passes a progress callback and prints what comes back.
"""

from __future__ import annotations

import datetime as dt
import platform
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from coldindex._version import __version__
from coldindex.classify import Cuts
from coldindex.config import (
    ClassifyConfig,
    Config,
    IceFieldsOptions,
    IndexOptions,
    ProfileOptions,
    ProjectConfig,
    ReadOptions,
    ShiftsConfig,
    SkillConfig,
)
from coldindex.domain import Domain, Grid, derive_domain, make_grid, sample_lonlat_grid
from coldindex.errors import (
    InputError,
    TooFewDataError,
)
from coldindex.indices import IndexResult, compute_indices
from coldindex.interpolate import FAMILIES
from coldindex.io import files as io_files
from coldindex.io import readers, writers
from coldindex.parallel import warm_up
from coldindex.progress import ProgressEvent, emit
from coldindex.qc import QCResult, run_qc, year_hashes
from coldindex.regions import RegionWeights
from coldindex.schema import CASTS_FROM_PROFILES, HINDCAST

FROZEN_NAME = "frozen.json"
DOMAIN_NAME = "domain.geojson"
REGIONS_NAME = "regions.csv"
PROFILE_CASTS_NAME = "casts.csv"  # the casts made from profiles


@dataclass
class CheckRun:
    """Outcome of reading and quality-controlling a casts file."""

    qc: QCResult
    domain: Domain | None
    domain_source: str
    profile_casts: pd.DataFrame | None = None  # the casts made from profiles (--profiles)


@dataclass
class IndexRun:
    """Outcome of ``coldindex index``: results and the files written."""

    check: CheckRun
    result: IndexResult
    written: list[Path] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)


def _frozen(out: Path | None) -> dict:  # an index output folder or a release
    return readers.read_frozen(out / FROZEN_NAME) if out is not None else {}


INDEX_OUTPUTS = ("qc.csv", "indices.csv", "fields.nc", DOMAIN_NAME, FROZEN_NAME,
                 "provenance.json")
MEMORY_CAP_BYTES = 2 * 1024**3  # Common practice, no single source: a laptop-sized budget


def kriging_memory_bytes(n_casts: int, n_cells: int, n_years: int, sims: int,
                         workers: int = 1) -> int:
    """Working memory of the index computation, estimated before it starts. [bytes]

    One year's working set (:func:`coldindex.dense.working_memory_bytes`, exact or local
    kriging as the year's size decides) in each of ``workers`` processes, plus the mapped
    estimate and SD of every year (``2 Y m`` float64 values) once.
    """
    from coldindex.dense import working_memory_bytes

    one_year = working_memory_bytes(n_casts, n_cells, 0, sims)
    return max(int(workers), 1) * one_year + 16 * int(n_years) * int(n_cells)


MAX_CELLS = 2_000_000  # cap on grid cells, checked before the grid is laid (no source)


def _check_grid_size(domain: Domain, options: IndexOptions) -> None:
    cells = domain.area_km2 / options.grid_km**2
    if not cells <= MAX_CELLS:
        raise InputError(f"The domain ({domain.area_km2:.3g} km2) holds about {cells:.3g} grid "
                         f"cells of {options.grid_km:g} km, above the cap of {MAX_CELLS:,}; give "
                         "the survey area as the domain or a coarser grid ({option}).",
                         option=("index", "grid_km"))


def _check_memory(casts: pd.DataFrame, grid: Grid, options: IndexOptions,
                  workers: int = 1) -> None:
    counts = casts.groupby("year").size()
    n, year = int(counts.max()), int(counts.idxmax())
    m = int(grid.mask.sum())
    need = kriging_memory_bytes(n, m, len(counts), options.sims, workers)
    if need > MEMORY_CAP_BYTES:
        raise InputError(
            f"Mapping {year} ({n} casts) on {m} grid cells of {options.grid_km:g} km with "
            f"{workers} worker(s) needs about {need / 1024**3:.1f} GB, above the "
            f"{MEMORY_CAP_BYTES / 1024**3:.0f} GB cap; use a coarser grid ({{option}}), fewer "
            "simulations or workers, or thin the casts of that year.",
            option=("index", "grid_km"))


def region_weights_for(domain: Domain, grid: Grid, options: IndexOptions,
                       bathy: tuple[np.ndarray, np.ndarray, np.ndarray] | None,
                       regions_path: Path | None) -> tuple[RegionWeights | None, list[str]]:
    """Regions (``--regions``) and depth zones (``--depth-zones``) as cell weights, with notes.

    The notes report the domain area outside every region and outside every zone.
    """
    from coldindex import regions as rg

    parts: list[rg.RegionWeights] = []
    notes: list[str] = []
    if regions_path is not None:
        parts.append(rg.region_weights(grid, domain, readers.read_regions(regions_path, domain)))
    zones = options.zones()
    if zones:
        if bathy is None:
            raise InputError("{option} needs the bathymetry to place the cells in depth "
                             "zones; give the bathymetry or leave the zones empty.",
                             option=("index", "depth_zones"))
        depth = np.abs(sample_lonlat_grid(*bathy, grid.lon[grid.mask], grid.lat[grid.mask]))
        parts.append(rg.depth_zone_weights(depth, grid.active_area(), zones))
    total = float(grid.active_area().sum())
    for p in parts:
        if p.outside_km2 > 1e-6 * total:
            notes.append(f"{p.outside_km2:.0f} km² of the domain ({p.outside_km2 / total:.1%}) "
                         f"lies outside every {p.kind}")
    return rg.combine(parts), notes


def mark_spatial_outliers(table: pd.DataFrame, outliers: pd.DataFrame,
                          z_max: float) -> pd.DataFrame:
    """The QC table with the spatial outliers' flag and z in ``detail``."""
    if outliers.empty:
        return table
    t = table.copy()
    z = dict(zip(outliers["row"], outliers["z"], strict=True))
    hit = t["row"].isin(z)
    t.loc[hit, "flag"] = "spatial_outlier"
    t.loc[hit, "detail"] = [f"leave-one-out z = {z[r]:+.2f} (|z| > {z_max:g}); kept out of "
                            "the variogram fit and the map" for r in t.loc[hit, "row"]]
    return t


def _write_index_outputs(out: Path, check: CheckRun, result: IndexResult, grid: Grid,
                         options: IndexOptions) -> tuple[list[Path], dict]:
    """Write qc.csv, indices.csv, fields.nc, domain.geojson and frozen.json into ``out``.

    ``out`` is a staging folder (``coldindex index``) or a partial release (``update``);
    neither is visible under its final name before everything is written.
    """
    assert check.domain is not None
    fields = writers.fields_dataset(result.years, result.estimate, result.sd,
                                    options.thresholds, grid, check.domain, result.casts)
    frozen = {"projection": check.domain.crs.srs, "grid_km": options.grid_km,
              "domain_source": check.domain_source,
              "variogram_family": result.family if result.family in FAMILIES else None,
              "family_scores": result.family_scores or None,
              "family_score": ("pooled -2 log L" if result.fit_method != "wls"
                               else "pooled LOO RMSE (degC)"),
              "reference_spacing_km": (round(result.reference_spacing_km, 6)
                                       if np.isfinite(result.reference_spacing_km) else None),
              "reference_day": result.reference_day}
    written = [
        writers.write_table(mark_spatial_outliers(check.qc.table, result.outliers,
                                                  options.outlier_z), out / "qc.csv"),
        writers.write_table(result.table, out / "indices.csv"),
        writers.write_netcdf(fields, out / "fields.nc"),
        writers.write_json(check.domain.to_geojson(), out / DOMAIN_NAME),
        writers.write_json(frozen, out / FROZEN_NAME),
    ]
    if check.profile_casts is not None:  # the casts made from profiles, with provenance
        written.append(writers.write_table(check.profile_casts, out / PROFILE_CASTS_NAME,
                                           CASTS_FROM_PROFILES))
    if result.regions is not None:
        written.append(writers.write_table(result.regions, out / REGIONS_NAME))
    return written, frozen


def run_check(casts_path: Path, mapping: Mapping[str, str] | None = None,
              domain_path: Path | None = None, options: IndexOptions | None = None,
              previous_out: Path | None = None, derive: bool = False, *,
              profiles: ProfileOptions | None = None,
              bathymetry_path: Path | None = None,
              outlier_min_casts: int = 0, read: ReadOptions | None = None) -> CheckRun:
    """Read casts, pick the domain (given, frozen, derived or none) and run QC.

    Parameters
    ----------
    casts_path
        Casts file (CSV or Parquet).
    mapping
        Header mapping ``{ours: theirs}``.
    domain_path
        Domain GeoJSON; without it a domain frozen in ``previous_out`` is reused,
        else one is derived when ``derive`` is true.
    options
        Index options (QC tolerances).
    previous_out
        Output folder of an earlier run, whose frozen domain is reused.
    derive
        Derive a domain from the stations when none is given or frozen.
    profiles
        Given: ``casts_path`` is a profiles file (``mapping`` maps its headers), turned
        into casts by :func:`coldindex.sources.profile_casts` with these settings.
    bathymetry_path
        Sea-floor depth for profiles without a recorded bottom depth.
    outlier_min_casts
        When > 0 (``coldindex check``), years with at least this many casts also get the
        spatial-outlier check (``options.outlier_z``: one variogram fit a year, the
        family of ``options.variogram`` or exponential for ``auto``); flagged casts are
        marked ``spatial_outlier`` in the QC table. ``index`` and ``update`` run the
        check inside the index computation instead (fit, flag, refit).

    Returns
    -------
    CheckRun
        QC result and the domain used.
    """
    opts = options or IndexOptions()
    profile_table = None
    if profiles is not None:
        from coldindex.sources import profile_casts

        raw = profile_table = profile_casts(casts_path, mapping, profiles, opts, bathymetry_path)
    else:
        raw = readers.read_casts(casts_path, mapping, **_read_kwargs(read))
    domain: Domain | None = None
    source = "none"
    if domain_path is not None:
        domain, source = readers.read_domain(domain_path), f"given ({domain_path.name})"
    elif previous_out is not None and _frozen(previous_out) and io_files.is_file(
            previous_out / DOMAIN_NAME):
        domain = readers.read_domain(previous_out / DOMAIN_NAME)
        source = f"frozen ({DOMAIN_NAME} of {previous_out.name})"
    qc_kwargs = {"source": str(casts_path), "freeze_tolerance_c": opts.freeze_tolerance_c,
                 "max_bottom_c": opts.max_bottom_c, "default_salinity": opts.default_salinity}
    if domain is None and derive:
        pre = run_qc(raw, None, **qc_kwargs)  # type: ignore[arg-type]
        c = pre.casts
        if c.empty:
            raise InputError(f"{casts_path} has no usable casts; see the flags with "
                             "coldindex check.")
        domain = derive_domain(c["lon"], c["lat"], c["year"], c["station"])
        source = "derived from the stations sampled in at least half of the years"
    qc = run_qc(raw, domain, **qc_kwargs)  # type: ignore[arg-type]
    if profile_table is not None:
        from coldindex.profiles import apply_profile_flags

        qc = apply_profile_flags(qc, profile_table)
    if outlier_min_casts > 0 and opts.outlier_z > 0 and not qc.casts.empty:
        from coldindex.indices import find_spatial_outliers

        family = opts.variogram if opts.variogram != "auto" else "exponential"
        out = find_spatial_outliers(qc.casts, opts.outlier_z, outlier_min_casts, family,
                                    opts.fit)
        if len(out):
            qc = QCResult(table=mark_spatial_outliers(qc.table, out, opts.outlier_z),
                          casts=qc.casts[~qc.casts["row"].isin(out["row"])]
                          .reset_index(drop=True))
    return CheckRun(qc=qc, domain=domain, domain_source=source, profile_casts=profile_table)


def run_index(casts_path: Path, out: Path, options: IndexOptions,
              mapping: Mapping[str, str] | None = None, domain_path: Path | None = None,
              bathymetry_path: Path | None = None,
              progress: Callable[[ProgressEvent], None] | None = None,
              regions_path: Path | None = None,
              profiles: ProfileOptions | None = None, read: ReadOptions | None = None,
              workers: int = 1, scheduler: str | None = None) -> IndexRun:
    """Compute the indices and write ``indices.csv``, ``fields.nc`` and companions.

    Every result is computed before the first file is written; the outputs are
    staged together and replace the old ones only when all are written
    (:class:`coldindex.io.writers.OutputSet`); an output that would replace an input
    is refused before any work.

    Parameters
    ----------
    casts_path, out
        Casts file and output folder.
    options
        Index settings.
    mapping
        Header mapping ``{ours: theirs}``.
    domain_path, bathymetry_path
        Optional domain GeoJSON and bathymetry NetCDF.
    progress
        Called with each :class:`coldindex.progress.ProgressEvent`.
    profiles
        Given: ``casts_path`` is a profiles file; ``casts.csv`` (the casts made from
        it) is written too.

    Returns
    -------
    IndexRun
        Results, notes and the files written.
    """
    outputs = writers.plan_outputs(
        out, "index", INDEX_OUTPUTS + ((PROFILE_CASTS_NAME,) if profiles else ()),
        [casts_path, domain_path, bathymetry_path])
    frozen = _frozen(out)
    warm_up(workers, scheduler)  # the worker processes start while the casts are read
    check = run_check(casts_path, mapping, domain_path, options, previous_out=out, derive=True,
                      profiles=profiles, bathymetry_path=bathymetry_path, read=read)
    assert check.domain is not None
    if check.qc.casts.empty:
        raise InputError(f"{casts_path} has no usable casts; run coldindex check to see why.")
    bathy = readers.read_bathymetry(bathymetry_path) if bathymetry_path else None
    _check_grid_size(check.domain, options)
    grid = make_grid(check.domain, options.grid_km)
    _check_memory(check.qc.casts, grid, options, workers if scheduler is None else 1)
    frozen_family = frozen.get("variogram_family") if options.variogram == "auto" else None
    notes = []
    if frozen_family:
        notes.append(f"variogram family {frozen_family} reused from {out / FROZEN_NAME}")
    frozen_spacing = frozen.get("reference_spacing_km")
    if frozen and frozen_spacing is None:
        notes.append(f"{out / FROZEN_NAME} has no reference station spacing (made by an older "
                     "version); it is computed once from these casts and frozen from now on")
    regions, region_notes = region_weights_for(check.domain, grid, options, bathy,
                                               regions_path)
    notes += region_notes
    result = compute_indices(check.qc.casts, check.domain, grid, options, bathy,
                             frozen_family=frozen_family, progress=progress,
                             frozen_spacing_km=frozen_spacing, regions=regions,
                             frozen_reference_day=frozen.get("reference_day"),
                             workers=workers, scheduler=scheduler)

    inputs = {"profiles" if profiles else "casts": {"path": str(casts_path),
                                                    "sha256": writers.sha256_file(casts_path)}}
    for name, p in (("domain", domain_path), ("bathymetry", bathymetry_path),
                    ("regions", regions_path)):
        if p is not None:
            inputs[name] = {"path": str(p), "sha256": writers.sha256_file(p)}
    if regions is not None:  # an extra output, checked like the declared ones
        writers.refuse_overwriting_inputs(writers.output_targets(out, [REGIONS_NAME]),
                                          [casts_path, domain_path, bathymetry_path,
                                           regions_path], "--out")
        outputs.names.append(REGIONS_NAME)
    emit(progress, "writing", 0, 1)
    with outputs as stage:
        written, frozen_out = _write_index_outputs(stage.dir, check, result, grid, options)
        provenance = {
            "tool": "coldindex", "version": __version__, "command": "index",
            "python": platform.python_version(),
            "created_utc": dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds"),
            "parameters": options.model_dump(mode="json"), "column_mapping": dict(mapping or {}),
            "inputs": inputs, "casts_sha256_by_year": year_hashes(check.qc.table),
            "frozen": frozen_out,
            "outputs": {p.name: writers.sha256_file(p) for p in written},
        }
        writers.write_json(provenance, stage.path("provenance.json"))
    emit(progress, "writing", 1, 1)
    return IndexRun(check=check, result=result, written=stage.written, notes=notes)


# --------------------------------------------------------------------------------------
# One run function a stage, used by its command and by the yearly update alike: each
# reads its inputs through io.readers, computes, and returns its outputs by file name
# (frames become CSV, mappings JSON) with its figures; the caller writes them
# (io.writers.write_outputs), so a stage's files are the same from either place.
# --------------------------------------------------------------------------------------


@dataclass
class StageRun:
    """A stage's outputs by file name, its figures by name, and the result itself."""

    files: dict[str, Any]
    figures: dict[str, Any] = field(default_factory=dict)
    result: Any = None
    cuts: Cuts | None = None  # the cut values the stage used


def read_cuts_for(path: Path, column: str) -> Cuts:
    """Cut values from an earlier ``cuts.json``; refused when made for another column."""
    c = Cuts.from_dict(readers.read_cuts(path), str(path))
    if c.column != column:
        raise InputError(f"{path} holds cut values for {c.column!r}, not {column!r}; derive "
                         "new ones or give the matching file.")
    return c


def _enough(n: int, need: int, what: str, stage: str) -> None:
    if n < need:
        raise TooFewDataError(f"{n} years of {what} with a value, fewer than the {need} the "
                              f"{stage} needs; give a longer record (the yearly update skips "
                              "this stage until the record is long enough).")


def run_classify(series_path: Path, column: str, options: ClassifyConfig,
                 cuts: Cuts | None = None, mapping: Mapping[str, str] | None = None
                 ) -> StageRun:
    """Year classes of one column: ``classes.csv`` and ``cuts.json``.

    Cut values come from ``cuts`` (an earlier release's or a given file's), else
    from ``options.cut_values``, else from ``options.rule`` over its reference period.
    """
    from coldindex import classify as cl

    df = readers.read_series(series_path, column, mapping)
    colder = options.colder or None
    if cuts is None and options.cut_values:
        low, high = options.cut_values
        cuts = cl.Cuts(column, low, high, "given", None,
                       colder or cl.colder_direction(column))
    if cuts is None:
        cuts = cl.cuts_by_rule(df["year"], df["value"], column, options.rule, options.period,
                               colder)
    table = cl.classify(df["year"], df["value"], cuts, df["sd"] if "sd" in df else None,
                        options.period)
    return StageRun({"classes.csv": table, "cuts.json": cuts.to_dict()}, result=cuts)


def run_shifts(series_path: Path, column: str, options: ShiftsConfig,
               mapping: Mapping[str, str] | None = None) -> StageRun:
    """Regime shifts of one column with red-noise p-values: ``shifts.csv``, ``regimes.csv``."""
    from coldindex.regimes import detect_shifts

    df = readers.read_series(series_path, column, mapping)
    need = 2 * options.cutoff if "stars" in options.methods else 2 * options.min_size
    _enough(int(df["value"].notna().sum()), need, column, "shift test")
    res = detect_shifts(df["year"], df["value"], options.methods, options)
    return StageRun({"shifts.csv": res.shifts, "regimes.csv": res.regimes}, result=res)


def run_skill(ice_path: Path, target_path: Path, column: str, options: SkillConfig,
              ice_options: IceFieldsOptions | None = None, cuts: Cuts | None = None,
              ice_mapping: Mapping[str, str] | None = None,
              target_mapping: Mapping[str, str] | None = None) -> StageRun:
    """Lagged skill of winter ice, hindcast and outlook, with two figures.

    Files: ``skill.csv``, ``hindcast.csv``, ``outlook.json``.
    """
    from coldindex import classify as cl
    from coldindex import skill as sk
    from coldindex.io.icefields import read_ice_series
    from coldindex.report.figures import hindcast_figure, skill_figure

    io = ice_options or IceFieldsOptions()
    ice = sk.ice_frame(read_ice_series(ice_path, dict(ice_mapping or {}), io.quantity, io.region),
                       str(ice_path))
    series = readers.read_series(target_path, column, target_mapping)
    target = pd.Series(series["value"].to_numpy(), index=series["year"].to_numpy()).dropna()
    _enough(len(target), SkillConfig.min_years, column, "hindcast")
    doy = None
    if not options.survey_month:
        try:
            doy = readers.read_series(target_path, "median_doy", target_mapping)["value"]
        except InputError:
            doy = None  # survey_month() says what to do
    survey = sk.survey_month(options.survey_month or None, doy)
    preds = sk.winter_predictors(ice, options.month_list, options.winter, survey=survey)
    c = cuts or cl.cuts_by_rule(target.index, target.to_numpy(), column, "tercile",
                                options.period)
    table, hc, ol = sk.skill_and_outlook(
        preds, target, options.lag_list, c, options.confidence, options.period,
        options.leave_out, None if options.outlook_lag < 0 else options.outlook_lag,
        options.outlook_q_max)
    return StageRun(
        {"skill.csv": table,
         "hindcast.csv": hc.table[list(HINDCAST.names)],
         "outlook.json": ol},
        {"skill": skill_figure(table), "hindcast": hindcast_figure(hc.table, ol, column)},
        result=(table, hc, ol, survey))


def run_project(trajectory_paths: Sequence[Path], observed_path: Path, column: str,
                options: ProjectConfig, cuts: Cuts | None = None,
                domain_area_km2: float | None = None,
                trajectory_mapping: Mapping[str, str] | None = None,
                observed_mapping: Mapping[str, str] | None = None,
                gridded: GriddedSource | None = None) -> StageRun:
    """Bias-adjusted trajectories, cold-year probability and stop years, with two figures.

    Files: ``projection.csv``, ``emergence.csv``.
    """
    from coldindex import classify as cl
    from coldindex import project as pj
    from coldindex.report.figures import projection_figure, stop_year_figure

    readers.refuse_repeated_files(trajectory_paths, "trajectories")
    obs = readers.read_series(observed_path, column, observed_mapping)
    c = cuts or cl.cuts_by_rule(obs["year"], obs["value"], column)
    if gridded is not None:
        from coldindex import gridded as gd

        traj = gd.trajectories_from_netcdf(list(trajectory_paths), gridded.fields, column,
                                           gridded.var, gridded.season, options.adjust,
                                           options.period, gridded.scheduler)
        adjust, upstream = "none", options.adjust
    else:
        pj.check_units(column, options.units or None)
        traj = pd.concat([pj.trajectory_frame(readers.read_trajectories(p, trajectory_mapping),
                                              str(p)) for p in trajectory_paths],
                         ignore_index=True)
        adjust, upstream = options.adjust, "none"
    readers.check_trajectories(traj, ", ".join(map(str, trajectory_paths)))
    opts = pj.ProjectOptions(adjust=adjust, calibration=options.period, window=options.window,
                             p_stop=options.p_stop, short_calibration=options.short_calibration,
                             adjusted_upstream=upstream)
    bound = domain_area_km2 if column.startswith("below_") else None
    res = pj.project(traj, obs["year"], obs["value"], c, opts, bound)
    return StageRun({"projection.csv": res.projection, "emergence.csv": res.emergence},
                    {"projection": projection_figure(res.projection, res.emergence),
                     "stop_years": stop_year_figure(res.emergence,
                                                    int(res.projection["year"].max()))},
                    result=res, cuts=c)


@dataclass(frozen=True)
class GriddedSource:
    """The gridded projection path: observed ``fields.nc``, variable, season, scheduler."""

    fields: Path
    var: str | None = None
    season: str = "6-8"
    scheduler: str | None = None


@dataclass
class IndexStage:
    """The index stage inside the update: QC, indices and their files, with what was frozen."""

    check: CheckRun
    result: IndexResult
    grid: Grid
    domain: Domain
    frozen: dict
    written: list[Path]
    notes: list[str]


def index_release_stage(cfg: Config, rel: Path, prev: Path | None,
                        execution: object = None) -> IndexStage:
    """Check and index into the partial release ``rel``, reusing what ``prev`` froze."""
    opts = cfg.index
    from_profiles = cfg.inputs.profiles is not None
    casts_path = cfg.inputs.profiles if from_profiles else cfg.inputs.casts
    assert casts_path is not None
    notes: list[str] = []
    workers = getattr(execution, "workers", 1)
    scheduler = getattr(execution, "scheduler", None)
    warm_up(workers, scheduler)  # the worker processes start while the casts are read
    check = run_check(casts_path, cfg.profile_columns if from_profiles else cfg.columns,
                      cfg.inputs.domain, opts, previous_out=prev, derive=True,
                      profiles=cfg.profiles if from_profiles else None,
                      bathymetry_path=cfg.inputs.bathymetry, read=cfg.read)
    assert check.domain is not None
    if check.qc.casts.empty:
        raise InputError(f"{casts_path} has no usable casts; run coldindex check.")
    frozen_prev = _frozen(prev)
    family = frozen_prev.get("variogram_family") if opts.variogram == "auto" else None
    if family:
        notes.append(f"variogram family {family} reused from {prev.name if prev else ''}")
    _check_grid_size(check.domain, opts)
    grid = make_grid(check.domain, opts.grid_km)
    _check_memory(check.qc.casts, grid, opts, workers if scheduler is None else 1)
    bathy = readers.read_bathymetry(cfg.inputs.bathymetry) if cfg.inputs.bathymetry else None
    frozen_spacing = frozen_prev.get("reference_spacing_km")
    if frozen_prev and frozen_spacing is None:
        notes.append("the previous release has no reference station spacing (an older "
                     "version); coverage now uses one computed from these casts, frozen from "
                     "now on")
    regions, region_notes = region_weights_for(check.domain, grid, opts, bathy,
                                               cfg.inputs.regions)
    notes += region_notes
    res = compute_indices(check.qc.casts, check.domain, grid, opts, bathy, frozen_family=family,
                          frozen_spacing_km=frozen_spacing, regions=regions,
                          frozen_reference_day=frozen_prev.get("reference_day"),
                          progress=getattr(execution, "on_progress", None),
                          workers=workers, scheduler=scheduler)
    written, frozen = _write_index_outputs(rel, check, res, grid, opts)
    return IndexStage(check, res, grid, check.domain, frozen, written, notes)


def _read_kwargs(read: ReadOptions | None) -> dict:
    """Decimal mark and date format for the casts reader (empty: detected)."""
    if read is None:
        return {}
    return {k: v for k, v in (("decimal", read.decimal or None),
                              ("date_format", read.date_format or None)) if v is not None}
