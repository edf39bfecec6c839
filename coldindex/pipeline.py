"""Runs that tie readers, computation and writers together.

``run_check`` and ``run_index`` serve the single commands; the annual update
(every stage into one release) grows here. Nothing in this module prints: the
CLI passes a progress callback and prints what comes back.
"""

from __future__ import annotations

import datetime as dt
import json
import os
import platform
import re
import tempfile
from collections.abc import Callable, Mapping
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from coldindex._version import __version__
from coldindex.classify import reference_values
from coldindex.config import Config, IndexOptions, ProfileOptions, ShiftsConfig
from coldindex.domain import Domain, Grid, derive_domain, make_grid, sample_lonlat_grid
from coldindex.errors import (
    BusyError,
    ColdindexError,
    ConfigError,
    InputError,
    OutputError,
    StageError,
    os_error_sentence,
)
from coldindex.indices import IndexResult, compute_indices
from coldindex.interpolate import FAMILIES
from coldindex.io import readers, writers
from coldindex.project import ProjectionResult
from coldindex.qc import QCResult, run_qc, year_hashes
from coldindex.regimes import ShiftResult
from coldindex.regions import RegionWeights

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
    if out is None or not (out / FROZEN_NAME).is_file():
        return {}
    try:
        obj = json.loads((out / FROZEN_NAME).read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError, RecursionError):
        obj = None
    if not isinstance(obj, dict) or not isinstance(obj.get("variogram_family"), (str, type(None))):
        raise InputError(f"{out / FROZEN_NAME} is damaged; delete it to choose the domain and "
                         "variogram family afresh (past values may move).")
    return obj


INDEX_OUTPUTS = ("qc.csv", "indices.csv", "fields.nc", DOMAIN_NAME, FROZEN_NAME,
                 "provenance.json")
MEMORY_CAP_BYTES = 2 * 1024**3  # Common practice, no single source: a laptop-sized budget


def kriging_memory_bytes(n_casts: int, n_cells: int, n_years: int, sims: int) -> int:
    """Working memory of the index computation, estimated before it starts. [bytes]

    ``8 * (4 n^2 + n m + (2 Y + S) m)``: four n x n kriging matrices for the year with
    the most casts (n), the cell-to-cast distances (n x m active cells), the mapped
    estimate and SD of every year (Y) and one year's simulations (S); float64.
    """
    n, m = int(n_casts), int(n_cells)
    return 8 * (4 * n * n + n * m + (2 * int(n_years) + int(sims)) * m)


MAX_CELLS = 2_000_000  # cap on grid cells, checked before the grid is laid (no source)


def _check_grid_size(domain: Domain, options: IndexOptions) -> None:
    cells = domain.area_km2 / options.grid_km**2
    if not cells <= MAX_CELLS:
        raise InputError(f"The domain ({domain.area_km2:.3g} km2) holds about {cells:.3g} grid "
                         f"cells of {options.grid_km:g} km, above the cap of {MAX_CELLS:,}; give "
                         "the survey area as the domain or a coarser grid (--grid-km, "
                         "index.grid_km).")


def _check_memory(casts: pd.DataFrame, grid: Grid, options: IndexOptions) -> None:
    counts = casts.groupby("year").size()
    n, year = int(counts.max()), int(counts.idxmax())
    m = int(grid.mask.sum())
    need = kriging_memory_bytes(n, m, len(counts), options.sims)
    if need > MEMORY_CAP_BYTES:
        raise InputError(
            f"Mapping {year} ({n} casts) on {m} grid cells of {options.grid_km:g} km needs "
            f"about {need / 1024**3:.1f} GB, above the {MEMORY_CAP_BYTES / 1024**3:.0f} GB "
            "cap; use a coarser grid (--grid-km, index.grid_km), fewer simulations, or thin "
            "the casts of that year.")


def region_weights_for(domain: Domain, grid: Grid, options: IndexOptions,
                       bathy: tuple[np.ndarray, np.ndarray, np.ndarray] | None,
                       regions_path: Path | None, zones_option: str = "--depth-zones"
                       ) -> tuple[RegionWeights | None, list[str]]:
    """Regions (``--regions``) and depth zones (``--depth-zones``) as cell weights, with notes.

    The notes report the domain area outside every region and outside every zone.
    """
    from coldindex import regions as rg

    parts: list[rg.RegionWeights] = []
    notes: list[str] = []
    if regions_path is not None:
        parts.append(rg.region_weights(grid, domain, readers.read_regions(regions_path, domain)))
    zones = rg.parse_depth_zones(options.depth_zones, zones_option)
    if zones:
        if bathy is None:
            raise InputError(f"{zones_option} needs the bathymetry (--bathymetry or "
                             "inputs.bathymetry) to place the cells in depth zones.")
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
        writers.write_csv(mark_spatial_outliers(check.qc.table, result.outliers,
                                                options.outlier_z).drop(columns=["doy"]).reindex(
            columns=["row", "year", "station", "lat", "lon", "bottom_c", "flag", "detail"]),
            out / "qc.csv"),
        writers.write_csv(result.table, out / "indices.csv"),
        writers.write_netcdf(fields, out / "fields.nc"),
        writers.write_json(check.domain.to_geojson(), out / DOMAIN_NAME),
        writers.write_json(frozen, out / FROZEN_NAME),
    ]
    if check.profile_casts is not None:  # the casts made from profiles, with provenance
        written.append(writers.write_csv(check.profile_casts, out / PROFILE_CASTS_NAME))
    if result.regions is not None:
        written.append(writers.write_csv(result.regions, out / REGIONS_NAME))
    return written, frozen


def run_check(casts_path: Path, mapping: Mapping[str, str] | None = None,
              domain_path: Path | None = None, options: IndexOptions | None = None,
              previous_out: Path | None = None, derive: bool = False, *,
              profiles: ProfileOptions | None = None,
              bathymetry_path: Path | None = None,
              outlier_min_casts: int = 0) -> CheckRun:
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
        raw = readers.read_casts(casts_path, mapping)
    domain: Domain | None = None
    source = "none"
    if domain_path is not None:
        domain, source = readers.read_domain(domain_path), f"given ({domain_path})"
    elif previous_out is not None and (previous_out / DOMAIN_NAME).is_file() and _frozen(
            previous_out):
        domain = readers.read_domain(previous_out / DOMAIN_NAME)
        source = f"frozen ({previous_out / DOMAIN_NAME})"
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
              progress: Callable[[int], None] | None = None,
              regions_path: Path | None = None,
              on_start: Callable[[int], None] | None = None,
              profiles: ProfileOptions | None = None) -> IndexRun:
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
        Called with each year when done.
    on_start
        Called once with the number of years before the first one starts.
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
    check = run_check(casts_path, mapping, domain_path, options, previous_out=out, derive=True,
                      profiles=profiles, bathymetry_path=bathymetry_path)
    assert check.domain is not None
    if check.qc.casts.empty:
        raise InputError(f"{casts_path} has no usable casts; run coldindex check to see why.")
    bathy = readers.read_bathymetry(bathymetry_path) if bathymetry_path else None
    _check_grid_size(check.domain, options)
    grid = make_grid(check.domain, options.grid_km)
    _check_memory(check.qc.casts, grid, options)
    frozen_family = frozen.get("variogram_family") if options.variogram == "auto" else None
    notes = []
    if frozen_family:
        notes.append(f"variogram family {frozen_family} reused from {out / FROZEN_NAME}")
    if on_start is not None:
        on_start(int(check.qc.casts["year"].nunique()))
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
                             frozen_reference_day=frozen.get("reference_day"))

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
    with outputs as stage:
        written, frozen_out = _write_index_outputs(stage.dir, check, result, grid, options)
        provenance = {
            "tool": "coldindex", "version": __version__, "command": "index",
            "python": platform.python_version(),
            "created_utc": dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds"),
            "parameters": asdict(options), "column_mapping": dict(mapping or {}),
            "inputs": inputs, "casts_sha256_by_year": year_hashes(check.qc.table),
            "frozen": frozen_out,
            "outputs": {p.name: writers.sha256_file(p) for p in written},
        }
        writers.write_json(provenance, stage.path("provenance.json"))
    return IndexRun(check=check, result=result, written=stage.written, notes=notes)


# --------------------------------------------------------------------------------------
# The annual update: one validated config -> a whole release.
# --------------------------------------------------------------------------------------

RELEASE_FORMAT = 1
UPDATE_STAGES = ("check", "index", "classify", "shifts", "skill", "project", "covariates",
                 "revisions", "figures", "report")
CAUTIONS = ("These indicators are decision support. They rest on stated assumptions (a "
            "Gaussian, stationary bottom-temperature field around a constant mean or a depth "
            "trend; one variogram family for all years; AR(1) red noise for the shift and "
            "skill tests) and carry the uncertainty of interpolation and of the variogram's "
            "parameters, not of the choice of model or of the survey design. Where they feed "
            "management advice, defer to the responsible agency's reviewed assessment.")


@dataclass
class UpdateRun:
    """Outcome of ``coldindex update``: the release folder and what it says."""

    release: Path
    headlines: list[str]
    notes: list[str] = field(default_factory=list)


RELEASE_NAME = re.compile(r"release-(\d{1,9})")
LATEST_NAME = "latest"
LOCK_NAME = ".coldindex.lock"
LOCK_WAIT_S = 3.0  # a second update waits this long for the first, then refuses


def _release_dirs(out: Path) -> dict[int, Path]:
    """``release-<n>`` folders directly inside ``out`` (links are not releases)."""
    found = {}
    for p in out.glob("release-*"):
        m = RELEASE_NAME.fullmatch(p.name)
        if m and p.is_dir() and not p.is_symlink():
            found[int(m.group(1))] = p
    return found


def _release_number(out: Path) -> int:
    return max(_release_dirs(out), default=0) + 1


def _is_complete(rel: Path) -> bool:
    prov = rel / "provenance.json"
    return prov.is_file() and not prov.is_symlink()


def _pointer_target(out: Path) -> tuple[Path | None, str]:
    """The release ``OUT/latest`` names, or None with the reason it names none.

    A missing, empty or unreadable pointer names none (the caller recovers by
    scanning); a pointer that is a folder or a link, or names anything but a
    ``release-<n>`` folder directly inside ``out``, is refused.
    """
    pointer = out / LATEST_NAME
    if not os.path.lexists(pointer):
        return None, f"{pointer} is missing"
    if pointer.is_symlink() or not pointer.is_file():
        raise InputError(f"{pointer} is not a plain file (it is a folder or a link); remove it "
                         "and run again (the newest complete release is then found by its "
                         "name).")
    try:
        text = pointer.read_bytes()[:200].decode("utf-8").strip()
    except (OSError, UnicodeDecodeError):
        return None, f"{pointer} cannot be read"
    if not text:
        return None, f"{pointer} is empty"
    if not RELEASE_NAME.fullmatch(text) or (out / text).is_symlink():
        raise InputError(f"{pointer} names {text[:60]!r}, not a release-<n> folder inside {out}; "
                         "coldindex trusts only its own releases, so remove the pointer (the "
                         "newest complete release is then found by its name) or give "
                         "--previous.")
    return out / text, ""


def _load_provenance(rel: Path) -> dict:
    path = rel / "provenance.json"
    try:
        prov = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError, RecursionError):
        prov = None
    if not isinstance(prov, dict):
        raise InputError(f"{path} is damaged (not a complete JSON object); restore the release "
                         "or give --previous with an intact one.")
    return prov


def _verify_release(rel: Path, prov: dict, used: list[str]) -> None:
    """Check every file the update reads from a release against its recorded SHA-256."""
    hashes = prov.get("outputs_sha256")
    if not isinstance(hashes, dict) or "indices.csv" not in hashes:
        raise InputError(f"{rel / 'provenance.json'} records no checksums for the release's "
                         "files; restore it or give --previous with an intact release.")
    for name in used:
        path = rel / name
        if name not in hashes:
            if os.path.lexists(path):
                raise InputError(f"{path} is not recorded in {rel / 'provenance.json'} (it was "
                                 "added after the release); remove it or give --previous.")
            continue
        if path.is_symlink() or not path.is_file():
            raise InputError(f"{path} is missing from the previous release; restore it or give "
                             "--previous with an intact release.")
        if writers.sha256_file(path) != hashes[name]:
            raise InputError(f"{path} does not match the checksum in {rel / 'provenance.json'} "
                             "(it changed since the release); restore it or give --previous "
                             "with an intact release.")


def _previous_release(out: Path, previous: Path | None, used: list[str] | None = None
                      ) -> tuple[Path | None, list[str]]:
    """The release to compare with, verified, and notes on how it was found.

    ``--previous`` wins; otherwise the release ``OUT/latest`` names, unless a newer
    complete release exists (a run stopped between its rename and the pointer) or
    the pointer is lost, in which case the newest complete ``release-<n>`` is used.
    The files the update reads from it (``used``) are checked against the
    checksums of its ``provenance.json`` before any work.
    """
    notes: list[str] = []
    if previous is not None:
        if not previous.is_dir() or not _is_complete(previous):
            raise InputError(f"{previous} is not a coldindex release (no provenance.json); "
                             "give a release folder with --previous.")
        prev: Path | None = previous
    else:
        target, why = _pointer_target(out)
        complete = {n: p for n, p in _release_dirs(out).items() if _is_complete(p)}
        newest = complete[max(complete)] if complete else None
        if target is not None and not _is_complete(target):
            why = f"{out / LATEST_NAME} names {target.name}, which is not a complete release"
            target = None
        if target is None:
            prev = newest
            if newest is not None:
                notes.append(f"{why}; compared with {newest.name}, the newest complete release")
        else:
            prev = target
            if newest is not None and newest != target and int(
                    newest.name.split("-")[1]) > int(target.name.split("-")[1]):
                prev = newest
                notes.append(f"{out / LATEST_NAME} named {target.name} but {newest.name} is newer "
                             "and complete (an earlier run stopped before updating the pointer); "
                             f"compared with {newest.name}")
    if prev is None:
        return None, notes
    prov = _load_provenance(prev)
    if prov.get("release_format") != RELEASE_FORMAT:
        raise InputError(f"{prev} was written by coldindex {prov.get('version', '?')} in an "
                         "incompatible release format; start a new output folder or give "
                         "--previous with a compatible release.")
    _verify_release(prev, prov, used or ["indices.csv"])
    return prev, notes


def check_update_config(cfg: Config) -> None:
    """Settings that need parsing, checked before the update does any work.

    Month and lag texts, reference periods, the cut-value rule, and every column a
    stage reads from ``indices.csv`` (which the thresholds decide).
    """
    from coldindex import classify as cl
    from coldindex import skill as sk
    from coldindex.config import check_lags, check_months
    from coldindex.schema import indices_table

    check_months(sk.parse_months(cfg.skill.months), "skill.months")
    check_lags(sk.parse_lags(cfg.skill.lags), "skill.lags")
    for key, text in (("classify.reference", cfg.classify.reference),
                      ("covariates.reference", cfg.covariates.reference),
                      ("project.calibration", cfg.project.calibration)):
        try:
            cl.parse_reference(text or None)
        except InputError:
            raise ConfigError(f"{key} needs two years A-B with A <= B (or empty), got: "
                              f"{text!r}.") from None
    rule = cfg.classify.rule
    if rule.startswith("sd:"):
        try:
            k = float(rule[3:])
        except ValueError:
            k = float("nan")
        if not (np.isfinite(k) and 0 <= k <= 10):
            raise ConfigError(f"classify.rule sd:K needs a number K in 0..10, got: {rule!r}.")
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


def _same_input_twice(files: dict[str, Path | None]) -> None:
    seen: list[tuple[str, Path]] = []
    for key, p in files.items():
        if p is None:
            continue
        for other_key, q in seen:
            if writers.same_file(p, q):
                raise ConfigError(f"{key} and {other_key} name the same file ({p}); give each "
                                  "input once.")
        seen.append((key, p))


def _check_paths(cfg: Config, out: Path) -> None:
    if (cfg.inputs.casts is None) == (cfg.inputs.profiles is None):
        raise ConfigError("inputs.casts or inputs.profiles needs to be set (one of them, not "
                          "both): the path of the casts file or of the profiles file.")
    if cfg.inputs.ice is not None and cfg.inputs.ice_fields:
        raise ConfigError("inputs.ice and inputs.ice_fields are both set; give the monthly ice "
                          "file or the gridded ice fields, not both.")
    files = {"inputs.casts": cfg.inputs.casts, "inputs.domain": cfg.inputs.domain,
             "inputs.bathymetry": cfg.inputs.bathymetry, "inputs.ice": cfg.inputs.ice,
             **{f"inputs.trajectories[{k}]": p for k, p in enumerate(cfg.inputs.trajectories)},
             "inputs.profiles": cfg.inputs.profiles, "inputs.ice_regions": cfg.inputs.ice_regions,
             "inputs.regions": cfg.inputs.regions, "inputs.coastline": cfg.inputs.coastline,
             **{f"inputs.ice_fields[{k}]": p for k, p in enumerate(cfg.inputs.ice_fields)}}
    for key, p in files.items():
        if p is not None and not p.is_file():
            raise ConfigError(f"{key} names {p}, which does not exist or is not a file; fix the "
                              "path (relative to the config file).")
    _same_input_twice(files)
    # The update writes only a new release-<n> folder, the pointer and its lock: inputs
    # may sit inside --out (even inside an older release) but never be one of those.
    writers.refuse_overwriting_inputs([out / LATEST_NAME, out / LOCK_NAME],
                                      [*files.values(), cfg.source])
    for key, p in files.items():
        if p is not None and out.exists() and writers.same_file(out, p):
            raise ConfigError(f"The output folder {out} is the file of {key}; choose a folder.")


def covariates_table(indices: pd.DataFrame, columns: tuple[str, ...], lags: tuple[int, ...],
                     reference: tuple[int, int] | None) -> pd.DataFrame:
    """The assessor's covariates: each index, its uncertainty, its z-score and lagged copies.

    ``<col>_lag1`` on the row of year Y holds the value of year Y - 1 (aligned by year,
    so a missing year gives a blank, never a shifted value).
    """
    t = indices.set_index("year")
    years = np.arange(int(t.index.min()), int(t.index.max()) + 1)
    t = t.reindex(years)
    out: dict[str, np.ndarray] = {"year": years}  # one frame at the end: no fragmentation
    for col in columns:
        if col not in t.columns:
            raise InputError(f"covariates.columns names {col!r}, which indices.csv does not "
                             f"have; choose among {', '.join(c for c in t.columns if c)}.")
        v = t[col].to_numpy(float)
        out[col] = v
        for s in ("_sd", "_lo90", "_hi90"):
            if col + s in t.columns:
                out[col + s] = t[col + s].to_numpy(float)
        ref = reference_values(years, v, reference)
        sd = float(np.std(ref, ddof=1)) if len(ref) > 1 else float("nan")
        out[col + "_z"] = ((v - float(np.mean(ref))) / sd if sd > 0
                           else np.full(len(years), np.nan))
    for col in columns:
        for lag in lags:
            out[f"{col}_lag{lag}"] = pd.Series(out[col], index=years).reindex(
                years - lag).to_numpy()
            out[f"{col}_z_lag{lag}"] = pd.Series(out[col + "_z"],
                                                 index=years).reindex(years - lag).to_numpy()
    return pd.DataFrame(out)


def region_slug(name: str) -> str:
    """A region or zone name as a column prefix (``east south`` -> ``east_south``)."""
    slug = re.sub(r"[^0-9a-z]+", "_", name.lower()).strip("_")
    return slug if slug and not slug[0].isdigit() else f"r_{slug}"


def with_region_columns(indices: pd.DataFrame, regions: pd.DataFrame | None,
                        columns: tuple[str, ...]) -> tuple[pd.DataFrame, tuple[str, ...]]:
    """Indices widened by each region's copy of the covariate columns, and their names.

    Region ``east south``'s ``bottom_mean_c`` becomes ``east_south_bottom_mean_c`` (with
    its ``_sd``/``_lo90``/``_hi90``), so the assessor picks a region's covariates by name.
    """
    if regions is None or regions.empty:
        return indices, columns
    slugs = {n: region_slug(n) for n in regions["region"].unique()}
    if len(set(slugs.values())) < len(slugs):
        raise InputError("Two region names give the same column prefix in covariates.csv "
                         f"({', '.join(sorted(slugs))}); rename one of them.")
    wide = indices.set_index("year").copy()
    names = list(columns)
    extra: dict[str, np.ndarray] = {}
    for name, slug in slugs.items():
        g = regions[regions["region"] == name].set_index("year")
        for col in columns:
            for s in ("", "_sd", "_lo90", "_hi90"):
                if col + s in g.columns:
                    extra[f"{slug}_{col}{s}"] = g[col + s].reindex(wide.index).to_numpy(float)
            if col in g.columns:
                names.append(f"{slug}_{col}")
    wide = pd.concat([wide, pd.DataFrame(extra, index=wide.index)], axis=1)
    return wide.reset_index(), tuple(names)


def with_class_probabilities(cov: pd.DataFrame, classes: pd.DataFrame) -> pd.DataFrame:
    """Covariates with each classified column's class probabilities (``<col>_p_cold``, ...)."""
    if classes.empty or "p_cold" not in classes.columns:
        return cov
    out = cov.set_index("year").copy()  # copy: covariates_table's frame is fragmented
    extra: dict[str, np.ndarray] = {}
    for col, g in classes.groupby("column", sort=False):
        g = g.set_index("year")
        for p in ("p_cold", "p_average", "p_warm"):
            if g[p].notna().any():
                extra[f"{col}_{p}"] = g[p].reindex(out.index).to_numpy(float)
    return pd.concat([out, pd.DataFrame(extra, index=out.index)], axis=1).reset_index()


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


WITHDRAWN_SHIFT = "provisional regime shift withdrawn"


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


def _versions() -> dict[str, str]:
    import importlib.metadata as md

    out = {"python": platform.python_version()}
    for pkg in ("numpy", "scipy", "pandas", "xarray", "gstools", "matplotlib", "pyproj",
                "shapely", "ruptures", "netCDF4"):
        try:
            out[pkg] = md.version(pkg)
        except md.PackageNotFoundError:  # pragma: no cover
            out[pkg] = "absent"
    return out


def _config_dict(cfg: Config) -> dict:
    base = cfg.source.parent if cfg.source else Path(".")

    def rel(p: Path | None) -> str | None:
        if p is None:
            return None
        try:
            return str(p.resolve().relative_to(base.resolve()))
        except ValueError:
            return str(p)

    d = asdict(cfg)
    d["inputs"] = {k: ([rel(x) for x in v] if isinstance(v, tuple) else rel(v))
                   for k, v in asdict(cfg.inputs).items()}
    d.pop("source", None)
    return d


def run_update(cfg: Config, out: Path, previous: Path | None = None,
               progress: Callable[[str], None] | None = None) -> UpdateRun:
    """Run every stage into a new release folder, atomically.

    Paths and settings are checked first, before anything is created. The update
    then holds an exclusive lock on ``out`` (``out/.coldindex.lock``; a second update
    waits :data:`LOCK_WAIT_S` seconds, then refuses), finds and verifies the previous
    release, writes the new one into a private, uniquely named partial folder inside
    ``out``, renames it to ``release-<n>`` when complete and last replaces the
    ``out/latest`` pointer. A failure leaves no new release and the earlier ones
    intact; a run killed between the rename and the pointer leaves a complete
    release that the next run finds by its name.

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

    Returns
    -------
    UpdateRun
        The release folder and its headline sentences.
    """
    import shutil

    from filelock import FileLock, Timeout

    _check_paths(cfg, out)
    check_update_config(cfg)
    if previous is not None and not previous.is_dir():
        raise InputError(f"--previous {previous} is not a folder; give a release folder.")
    if out.exists():
        _pointer_target(out)  # refuse an untrusted pointer before creating anything
    writers.prepare_out_dir(out)
    lock = FileLock(str(out / LOCK_NAME), timeout=LOCK_WAIT_S)
    try:
        lock.acquire()
    except Timeout:
        raise BusyError(f"Another coldindex update is writing into {out}; wait for it to "
                        "finish, then run again.") from None
    except OSError as exc:
        raise OutputError(os_error_sentence(exc, "locking", out / LOCK_NAME)) from None
    try:
        for stale in out.glob(".release-*.partial*"):  # left by a killed run
            if stale.is_dir() and not stale.is_symlink():
                shutil.rmtree(stale, ignore_errors=True)
        used = ["indices.csv", FROZEN_NAME, DOMAIN_NAME, "shifts.csv",
                *(f"cuts/{c}.json" for c in cfg.classify.columns)]
        prev, notes = _previous_release(out, previous, used)
        n = _release_number(out)
        final = out / f"release-{n}"
        tmp = Path(tempfile.mkdtemp(prefix=f".release-{n}.partial-", dir=out))
        stage = ["check"]

        def on_stage(name: str) -> None:
            stage[0] = name
            if progress is not None:
                progress(name)

        try:
            headlines, build_notes = _build_release(cfg, tmp, prev, on_stage)
            if os.path.lexists(final):
                raise OutputError(f"{final} appeared while the update ran; remove it and run "
                                  "again.")
            umask = os.umask(0)
            os.umask(umask)
            os.chmod(tmp, 0o777 & ~umask)  # mkdtemp made it private while it was partial
            os.rename(tmp, final)
        except BaseException as exc:
            shutil.rmtree(tmp, ignore_errors=True)
            if isinstance(exc, (ColdindexError, KeyboardInterrupt, SystemExit)):
                raise
            raise _stage_error(exc, stage[0]) from exc
        writers.write_bytes(f"{final.name}\n".encode(), out / LATEST_NAME)
    finally:
        lock.release()
    return UpdateRun(release=final, headlines=headlines, notes=notes + build_notes)


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


def _stage(progress: Callable[[str], None] | None, name: str) -> None:
    if progress is not None:
        progress(name)


def _build_release(cfg: Config, rel: Path, prev: Path | None,
                   progress: Callable[[str], None] | None) -> tuple[list[str], list[str]]:
    from coldindex import classify as cl
    from coldindex import project as pj
    from coldindex import skill as sk
    from coldindex.regimes import ShiftOptions, detect_shifts
    from coldindex.report import figures as fg

    casts_path = cfg.inputs.casts or cfg.inputs.profiles
    assert casts_path is not None
    notes: list[str] = []
    headlines: list[str] = []
    written: list[Path] = []
    opts = cfg.index

    _stage(progress, "check")
    from_profiles = cfg.inputs.profiles is not None
    check = run_check(casts_path, cfg.profile_columns if from_profiles else cfg.columns,
                      cfg.inputs.domain, opts, previous_out=prev, derive=True,
                      profiles=cfg.profiles if from_profiles else None,
                      bathymetry_path=cfg.inputs.bathymetry)
    assert check.domain is not None
    if check.qc.casts.empty:
        raise InputError(f"{casts_path} has no usable casts; run coldindex check.")

    _stage(progress, "index")
    frozen_prev = _frozen(prev)
    family = frozen_prev.get("variogram_family") if opts.variogram == "auto" else None
    if family:
        notes.append(f"variogram family {family} reused from {prev}")
    _check_grid_size(check.domain, opts)
    grid = make_grid(check.domain, opts.grid_km)
    _check_memory(check.qc.casts, grid, opts)
    bathy = readers.read_bathymetry(cfg.inputs.bathymetry) if cfg.inputs.bathymetry else None
    frozen_spacing = frozen_prev.get("reference_spacing_km")
    if frozen_prev and frozen_spacing is None:
        notes.append("the previous release has no reference station spacing (an older "
                     "version); coverage now uses one computed from these casts, frozen from "
                     "now on")
    regions, region_notes = region_weights_for(check.domain, grid, opts, bathy,
                                               cfg.inputs.regions, "index.depth_zones")
    notes += region_notes
    res = compute_indices(check.qc.casts, check.domain, grid, opts, bathy, frozen_family=family,
                          frozen_spacing_km=frozen_spacing, regions=regions,
                          frozen_reference_day=frozen_prev.get("reference_day"))
    indices = res.table
    index_files, frozen = _write_index_outputs(rel, check, res, grid, opts)
    written += index_files
    series = {c: pd.Series(indices[c].to_numpy(float), index=indices["year"].to_numpy())
              for c in indices.columns if c != "year"
              and pd.api.types.is_numeric_dtype(indices[c])}

    _stage(progress, "classify")
    ref = cl.parse_reference(cfg.classify.reference or None)
    cuts: dict[str, cl.Cuts] = {}
    class_frames = []
    for col in cfg.classify.columns:
        if col not in series:
            raise InputError(f"classify.columns names {col!r}, which indices.csv does not "
                             "have; check the thresholds.")
        prev_cuts = prev / "cuts" / f"{col}.json" if prev else None
        c = None
        if prev_cuts is not None and prev_cuts.is_file():
            old = cl.Cuts.from_dict(readers.read_cuts(prev_cuts), str(prev_cuts))
            if old.rule == cfg.classify.rule and old.reference == (cfg.classify.reference or None):
                c = old
                notes.append(f"cut values of {col} reused from {prev_cuts}")
        if c is None:
            s = series[col].dropna()
            c = cl.cuts_by_rule(s.index, s.to_numpy(), col, cfg.classify.rule, ref)
        cuts[col] = c
        sd_col = f"{col}_sd"
        table = cl.classify(indices["year"], indices[col], c,
                            indices[sd_col] if sd_col in indices else None, ref)
        class_frames.append(table.assign(column=col))
        written.append(writers.write_json(c.to_dict(), rel / "cuts" / f"{col}.json"))
    classes = pd.concat(class_frames, ignore_index=True)
    classes = classes[["column", *[x for x in classes.columns if x != "column"]]]
    written.append(writers.write_csv(classes, rel / "classes.csv"))

    _stage(progress, "shifts")
    sc = cfg.shifts
    methods = {"both": ("stars", "pelt"), "stars": ("stars",), "pelt": ("pelt",)}[sc.method]
    s = series[sc.column]
    shifts = detect_shifts(s.index, s.to_numpy(), methods, ShiftOptions(
        cutoff=sc.cutoff, alpha=sc.alpha, huber=sc.huber, prewhiten=sc.prewhiten,
        min_size=sc.min_size, boot=sc.boot, seed=sc.seed, p_max=sc.p_max))
    written.append(writers.write_csv(shifts.shifts, rel / "shifts.csv"))
    written.append(writers.write_csv(shifts.regimes, rel / "regimes.csv"))

    _stage(progress, "skill")
    ol = skill_tab = hc = None
    if cfg.inputs.ice is not None or cfg.inputs.ice_fields:
        kc = cfg.skill
        if cfg.inputs.ice_fields:  # gridded fields -> ice_fields.csv -> the chosen series
            from coldindex.sources import release_ice_series

            ice, ice_written = release_ice_series(cfg, check.domain, rel)
            written += ice_written
        else:
            assert cfg.inputs.ice is not None
            ice = sk.ice_frame(readers.read_ice(cfg.inputs.ice, cfg.ice_columns),
                               str(cfg.inputs.ice))
        preds = sk.winter_predictors(ice, sk.parse_months(kc.months), kc.winter,
                                     survey=sk.survey_month(kc.survey_month,
                                                            indices["median_doy"]))
        tgt = series[kc.column].dropna()
        lag_list = sk.parse_lags(kc.lags)
        kcuts = cuts.get(kc.column) or cl.cuts_by_rule(tgt.index, tgt.to_numpy(), kc.column)
        skill_tab, hc, ol = sk.skill_and_outlook(
            preds, tgt, lag_list, kcuts, kc.confidence, None, kc.leave_out,
            None if kc.outlook_lag < 0 else kc.outlook_lag, kc.outlook_q_max)
        written.append(writers.write_csv(skill_tab, rel / "skill.csv"))
        written.append(writers.write_csv(hc.table[["year", "observed", "predicted",
                                                   "persistence"]], rel / "hindcast.csv"))
        written.append(writers.write_json(ol, rel / "outlook.json"))

    _stage(progress, "project")
    proj = None
    if cfg.inputs.trajectories:
        pc = cfg.project
        pj.check_units(pc.column, pc.units)
        traj = pd.concat([pj.trajectory_frame(readers.read_trajectories(
            p, cfg.trajectory_columns), str(p)) for p in cfg.inputs.trajectories],
            ignore_index=True)
        s = series[pc.column]
        pcuts = cuts.get(pc.column) or cl.cuts_by_rule(s.dropna().index,
                                                       s.dropna().to_numpy(), pc.column)
        bound = check.domain.area_km2 if pc.column.startswith("below_") else None
        proj = pj.project(traj, s.index, s.to_numpy(), pcuts, pj.ProjectOptions(
            adjust=pc.adjust, calibration=cl.parse_reference(pc.calibration or None),
            window=pc.window, p_stop=pc.p_stop, short_calibration=pc.short_calibration),
            bound)
        written.append(writers.write_csv(proj.projection, rel / "projection.csv"))
        written.append(writers.write_csv(proj.emergence, rel / "emergence.csv"))

    _stage(progress, "covariates")
    cov_source, cov_columns = with_region_columns(indices, res.regions, cfg.covariates.columns)
    cov = covariates_table(cov_source, cov_columns, cfg.covariates.lags,
                           cl.parse_reference(cfg.covariates.reference or None))
    cov = with_class_probabilities(cov, classes)
    written.append(writers.write_csv(cov, rel / "covariates.csv"))

    _stage(progress, "revisions")
    inputs = {"profiles" if from_profiles else "casts": writers.sha256_file(casts_path)}
    for name in ("domain", "bathymetry", "ice", "ice_regions"):
        p = getattr(cfg.inputs, name)
        if p is not None:
            inputs[name] = writers.sha256_file(p)
    for k, p in enumerate(cfg.inputs.trajectories):
        inputs[f"trajectories[{k}]"] = writers.sha256_file(p)
    if cfg.inputs.regions is not None:
        inputs["regions"] = writers.sha256_file(cfg.inputs.regions)
    for k, p in enumerate(cfg.inputs.ice_fields):
        inputs[f"ice_fields[{k}]"] = writers.sha256_file(p)
    prov: dict = {"tool": "coldindex", "version": __version__, "release_format": RELEASE_FORMAT,
                  "config": _config_dict(cfg), "parameters": asdict(opts),
                  "inputs_sha256": inputs,
                  "casts_sha256_by_year": year_hashes(check.qc.table), "frozen": frozen,
                  "previous_release": prev.name if prev is not None else None,
                  "versions": _versions()}
    if proj is not None:
        prov["projection_calibration"] = {
            "start": proj.calibration[0], "end": proj.calibration[1],
            "years": proj.calibration_years, "short_calibration": proj.short_calibration}
    prev_prov = json.loads((prev / "provenance.json").read_text()) if prev else None
    prev_ind = pd.read_csv(prev / "indices.csv") if prev else None
    # Compare the files as written (same rounding on both sides) and JSON-normalised
    # provenance (tuples read back as lists).
    prov = json.loads(json.dumps(prov))
    revisions = revisions_table(pd.read_csv(rel / "indices.csv"), prev_ind, prov, prev_prov,
                                cfg.report.tolerance)
    if prev is not None and (prev / "shifts.csv").is_file():
        withdrawn = withdrawn_shift_revisions(pd.read_csv(prev / "shifts.csv"),
                                              shifts.shifts, sc.column)
        if len(withdrawn):
            revisions = pd.concat([revisions.astype(withdrawn.dtypes.to_dict()), withdrawn],
                                  ignore_index=True)
    written.append(writers.write_csv(revisions, rel / "revisions.csv"))

    _stage(progress, "figures")
    from coldindex.report.page import column_label

    figs = {}
    ref_years = cl.parse_reference(cfg.classify.reference or None)
    pairs = [("bottom_mean_c", column_label("bottom_mean_c"))]
    area_col = next((c for c in cfg.classify.columns if c.startswith("below_")), None)
    if area_col:
        pairs.append((area_col, column_label(area_col)))
    figs["series"] = fg.series_figure(indices, pairs, classes, shifts.regimes,
                                      reference=ref_years)
    ok_years = [y for y, note in zip(res.years, indices["note"].fillna(""), strict=True)
                if not str(note).startswith("no indices")]
    idx = [res.years.index(y) for y in ok_years]
    outline = [np.asarray(r.coords) for p in getattr(check.domain.polygon_xy, "geoms",
                                                      [check.domain.polygon_xy])
               for r in [p.exterior]]
    cast_xy = [res.casts.loc[res.casts["year"] == y, ["x_km", "y_km"]].to_numpy()
               for y in ok_years]
    coast = (readers.read_coastline(cfg.inputs.coastline, check.domain)
             if cfg.inputs.coastline else None)
    contour = opts.thresholds[0]
    maps = grid.to_2d(res.estimate[idx])
    figs["maps"] = fg.maps_figure(ok_years, maps, grid.x, grid.y, outline, cast_xy, contour,
                                  lon=grid.lon, lat=grid.lat, coastline=coast)
    in_ref = [k for k, y in enumerate(ok_years)
              if ref_years is None or ref_years[0] <= y <= ref_years[1]]
    if len(in_ref) > 1:
        last = list(range(len(ok_years)))[-cfg.report.map_years:]
        stack = maps[in_ref]
        count = np.isfinite(stack).sum(axis=0)
        ref_map = np.where(count > 0, np.nansum(stack, axis=0) / np.maximum(count, 1), np.nan)
        anomalies = maps[last] - ref_map
        figs["anomalies"] = fg.maps_figure(
            [ok_years[k] for k in last], anomalies, grid.x, grid.y, outline,
            [cast_xy[k] for k in last], None, lon=grid.lon, lat=grid.lat, coastline=coast,
            label="anomaly (°C)", anomaly=True)
    if skill_tab is not None and hc is not None and ol is not None:
        figs["skill"] = fg.skill_figure(skill_tab)
        figs["hindcast"] = fg.hindcast_figure(hc.table, ol, column_label(cfg.skill.column))
    if proj is not None:
        figs["projection"] = fg.projection_figure(proj.projection, proj.emergence)
        figs["stop_years"] = fg.stop_year_figure(proj.emergence,
                                                 int(proj.projection["year"].max()))
    pngs: dict[str, bytes] = {}
    for name, fig in figs.items():
        written.append(writers.write_figure(fig, rel / "figures" / f"{name}.svg", close=False))
        written.append(writers.write_figure(fig, rel / "figures" / f"{name}.png"))
        pngs[name] = (rel / "figures" / f"{name}.png").read_bytes()

    _stage(progress, "report")
    headlines = _headlines(indices, classes, cuts, shifts.shifts, sc, ol, proj, revisions,
                           cfg)
    page = _report_page(cfg, indices, classes, shifts, skill_tab, proj, revisions, check,
                        pngs, headlines, prov, res=res, cuts=cuts, release=rel)
    written.append(writers.write_bytes(page.encode("utf-8"), rel / "report.html"))
    prov["outputs_sha256"] = {str(p.relative_to(rel)): writers.sha256_file(p)
                              for p in sorted(written)}
    prov["created_utc"] = dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds")
    writers.write_json(prov, rel / "provenance.json")
    return headlines, notes


def _headlines(indices: pd.DataFrame, classes: pd.DataFrame, cuts: dict, shifts: pd.DataFrame,
               sc: ShiftsConfig, ol: dict | None, proj: ProjectionResult | None,
               revisions: pd.DataFrame, cfg: Config) -> list[str]:
    """Sentences generated from the numbers, for the terminal and the report."""
    from coldindex.report.page import column_label

    out = []
    main = cfg.classify.columns[0]
    valid = indices.dropna(subset=[main])
    if len(valid):
        last = valid.iloc[-1]
        yr = int(last["year"])
        cls = classes[(classes["column"] == main) & (classes["year"] == yr)]["class"]
        colder = cuts[main].direction
        ranked = valid[main].rank(ascending=(colder == "lower"), method="min")
        rank = int(ranked.iloc[-1])
        unit = "°C" if main.endswith("_c") else "km²"
        text = (f"{yr} was a{'n' if str(cls.iloc[0]).startswith('a') else ''} "
                f"{cls.iloc[0]} year by {column_label(main).rsplit(' (', 1)[0]} "
                f"({last[main]:.3g} {unit}; the "
                f"{_ordinal(rank)} coldest of {len(valid)} years)")
        if len(valid) > 1:
            prev = valid.iloc[-2]
            text += (f", {last[main] - prev[main]:+.3g} {unit} from {int(prev['year'])}")
        out.append(text + ".")
    from coldindex.regimes import surviving

    sig = surviving(shifts, sc.p_max)
    if len(sig):
        items = ", ".join(f"{r.method.upper()} {r.year} ({r.mean_before:.3g} -> "
                          f"{r.mean_after:.3g}, p = {r.p_value:.3f}"
                          f"{', provisional' if r.provisional else ''})"
                          for r in sig.itertuples())
        out.append(f"Regime shifts in {sc.column} that survive the red-noise test "
                   f"(p < {sc.p_max:g}): {items}.")
    else:
        out.append(f"No regime shift in {sc.column} survives the red-noise test "
                   f"(p < {sc.p_max:g}).")
    if ol is not None:
        from coldindex.skill import outlook_sentence

        out.append("Outlook: " + outlook_sentence(ol, cfg.skill.column))
    if proj is not None:
        out += proj.summaries
    gone = revisions["cause"].astype(str).str.startswith(WITHDRAWN_SHIFT)
    n_values = int((~gone).sum())
    out.append(f"{n_values} past values changed since the previous release."
               if n_values else "No past value changed since the previous release.")
    if gone.any():
        out.append(f"{int(gone.sum())} provisional regime shift(s) of the previous release "
                   "withdrawn (revisions.csv).")
    return out


def _ordinal(n: int) -> str:
    suffix = "th" if 10 <= n % 100 <= 20 else {1: "st", 2: "nd", 3: "rd"}.get(n % 10, "th")
    return f"{n}{suffix}"


def _report_page(cfg: Config, indices: pd.DataFrame, classes: pd.DataFrame,
                 shifts: ShiftResult, skill_tab: pd.DataFrame | None,
                 proj: ProjectionResult | None,
                 revisions: pd.DataFrame, check: CheckRun, pngs: dict[str, bytes],
                 headlines: list[str], prov: dict, *, res: IndexResult | None = None,
                 cuts: Mapping[str, object] | None = None, release: Path | None = None) -> str:
    from coldindex.report import page as pg
    from coldindex.report.html import escape

    th = cfg.index.thresholds
    tt = pg.threshold_text(th)
    ok = indices.dropna(subset=["bottom_mean_c"])
    last_year = int(ok["year"].max()) if len(ok) else None
    number = None
    if release is not None:
        m = re.match(r"\.?release-(\d+)", release.name)
        number = int(m.group(1)) if m else None
    date = (pg.median_date(check.qc.casts, last_year) if last_year is not None else None)
    subtitle = pg.subtitle_text(number, last_year, date)
    title = cfg.report.title + (f", {last_year} survey" if last_year is not None else "")
    cols = ["year", "n_casts", "median_doy", "coverage", "bottom_mean_c",
            *[c for c in indices.columns if c.startswith("below_") and c.count("_") == 2],
            "surface_mean_c", "timing_adjustment_c", "cv_rmse_c", "note"]
    series_cols = ", ".join(pg.column_label(c) for c in
                            ["bottom_mean_c", *[c for c in cfg.classify.columns
                                                if c.startswith("below_")][:1]])
    S = pg.Section
    sections = [S("indices", "Indices", pg.indices_paragraphs(indices, th),
                  pg.figure_html(pngs.get("series"), "index series",
                                 f"Series of {series_cols}: black line and markers, year "
                                 "classes by marker (cold ▼, average ●, warm ▲), 90 % "
                                 "interval shaded blue, reference mean ± 1 SD in grey, "
                                 "latest year ringed.")
                  + pg.details_table(indices[[c for c in cols if c in indices]],
                                     "survey years"))]
    if res is not None and res.regions is not None:
        reg = res.regions
        reg_cols = ["year", "region", "region_km2", "bottom_mean_c",
                    *[c for c in reg.columns if c.startswith("below_") and c.count("_") == 2],
                    "note"]
        shown = reg[reg["year"] == reg["year"].max()] if len(reg) else reg
        sections.append(S("regions", "Regions and depth zones",
                          pg.regions_paragraphs(reg, th, check.domain.area_km2
                                                if check.domain is not None else None),
                          pg.details_table(shown[[c for c in reg_cols if c in reg]],
                                           "regions", shown=len(shown))
                          + "<details><summary>Every year and region</summary>"
                          + pg.details_table(reg[[c for c in reg_cols if c in reg]],
                                             "rows", shown=len(reg))
                          + "</details>"))
    maps_body = pg.figure_html(pngs.get("maps"), "bottom-temperature maps",
                               "Kriged bottom temperature of every survey year with indices "
                               f"(smooth process, nugget filtered); black line: the {th[0]:g} "
                               "°C contour; dots: the casts used; dotted lines: latitude and "
                               "longitude; the bar gives the scale in km.")
    maps_body += pg.figure_html(pngs.get("anomalies"), "anomaly maps",
                                "Bottom temperature minus the mean map of the reference "
                                "period, latest years (°C): blue colder, orange warmer.")
    sections.append(S("maps", "Bottom-temperature maps",
                      [f"Maps of every year on one colour scale; the thresholds of the areas "
                       f"are {tt}. Mapped values are least certain far from the casts (see "
                       "the standard deviation in fields.nc)."], maps_body))
    cls_paras, cls_body = pg.classes_body(classes, cuts or {})
    sections.append(S("classes", "Year classes", cls_paras, cls_body))
    sections.append(S("shifts", "Regime shifts",
                      pg.shifts_paragraphs(shifts.shifts, cfg.shifts.p_max, cfg.shifts.column),
                      pg.details_table(shifts.shifts, "shifts")
                      + pg.details_table(shifts.regimes, "regimes")))
    if skill_tab is not None:
        sections.append(S("skill", "Ice skill and outlook",
                          ["Correlation of each winter-ice predictor with the target at each "
                           "lag, with effective-sample-size p-values and Benjamini-Hochberg "
                           "q-values (outlined when q < 0.1), then the cross-validated "
                           "hindcast against persistence and the outlook with its interval."],
                          pg.figure_html(pngs.get("skill"), "skill", "Correlation by "
                                         "predictor and lag (outlined: q < 0.1).")
                          + pg.figure_html(pngs.get("hindcast"), "hindcast",
                                           "Observed, hindcast and persistence, with the "
                                           "outlook and its interval.")
                          + pg.details_table(skill_tab.sort_values("q_value"),
                                             "predictor and lag pairs", newest_last=False)))
    if proj is not None:
        sections.append(S("projections", "Projections",
                          ["Probability of a cold year under each model and scenario after "
                           "bias adjustment, and the stop year: the first year from which "
                           "the chance of any cold year in the window, from the smooth "
                           "expectation and the fitted year-to-year noise, stays below the "
                           "stop probability.",
                           "The last cold year is different: the last year a member was "
                           "actually cold in its adjusted trajectory. A stop year after it "
                           "means cold years stayed possible for a while though none was "
                           "drawn; a stop year before it means a late cold year was an "
                           "unlikely draw under the fitted noise. Plan on the stop year and "
                           "its spread across models, not on one trajectory's last cold "
                           "year."],
                          pg.figure_html(pngs.get("projection"), "projection",
                                         "Probability of a cold year by model, one panel a "
                                         "scenario; ▼ marks stop years.")
                          + pg.figure_html(pngs.get("stop_years"), "stop years",
                                           "Stop year by model and scenario; open arrows "
                                           "mark censored models (no stop year by the end "
                                           "of the record, or never cold in it).")
                          + pg.details_table(proj.emergence, "models and scenarios",
                                             newest_last=False)))
    sections.append(S("revisions", "Revisions",
                      [f"{len(revisions)} past values changed since the previous release, "
                       "each with its cause (new casts, a changed setting, a new method)."
                       if len(revisions) else "No past value changed beyond the tolerance."],
                      pg.details_table(revisions, "revisions") if len(revisions) else ""))
    outliers = res.outliers if res is not None else pd.DataFrame()
    qc_counts = check.qc.table["flag"].value_counts().rename_axis("flag").reset_index(
        name="casts")
    qc_body = f"<p>Domain: {escape(check.domain_source)}.</p>" + pg.details_table(
        qc_counts, "flags", newest_last=False)
    if len(outliers):
        qc_body += pg.details_table(outliers, "spatial outliers", newest_last=False)
    sections.append(S("qc", "Quality control",
                      pg.qc_paragraphs(check.qc.table, outliers, cfg.index.outlier_z), qc_body))
    stages = ["index", "shifts"] + (["skill"] if skill_tab is not None else []) + (
        ["project"] if proj is not None else [])
    sections.append(S("methods", "Methods", [pg.methods_paragraph(
        stages, with_drift=cfg.inputs.bathymetry is not None,
        with_sims=cfg.index.sims > 0 and cfg.index.method == "kriging",
        with_regions=res is not None and res.regions is not None,
        with_outliers=cfg.index.outlier_z > 0, with_timing=cfg.index.timing_drift)]))
    inputs = "".join(f"<li><code>{escape(k)}</code> sha256 {escape(v)}</li>"
                     for k, v in prov["inputs_sha256"].items())
    provenance = (f"<p>coldindex {escape(prov['version'])}; Python "
                  f"{escape(prov['versions']['python'])}, numpy "
                  f"{escape(prov['versions']['numpy'])}. Inputs:</p><ul>{inputs}</ul>"
                  "<p>The run time and per-output checksums are in provenance.json.</p>")
    return pg.render_page(title, subtitle, CAUTIONS, headlines, sections, provenance)
