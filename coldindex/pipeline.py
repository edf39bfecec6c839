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
from collections.abc import Callable, Mapping
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from coldindex._version import __version__
from coldindex.classify import reference_values
from coldindex.config import Config, IndexOptions, ShiftsConfig
from coldindex.domain import Domain, Grid, derive_domain, make_grid
from coldindex.errors import InputError
from coldindex.indices import IndexResult, compute_indices
from coldindex.interpolate import FAMILIES
from coldindex.io import readers, writers
from coldindex.project import ProjectionResult
from coldindex.qc import QCResult, run_qc, year_hashes
from coldindex.regimes import ShiftResult

FROZEN_NAME = "frozen.json"
DOMAIN_NAME = "domain.geojson"


@dataclass
class CheckRun:
    """Outcome of reading and quality-controlling a casts file."""

    qc: QCResult
    domain: Domain | None
    domain_source: str


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
        return json.loads((out / FROZEN_NAME).read_text(encoding="utf-8"))
    except json.JSONDecodeError:
        raise InputError(f"{out / FROZEN_NAME} is damaged; delete it to choose the domain and "
                         "variogram family afresh (past values may move).") from None


def _write_index_outputs(out: Path, check: CheckRun, result: IndexResult, grid: Grid,
                         options: IndexOptions) -> tuple[list[Path], dict]:
    """Write qc.csv, indices.csv, fields.nc, domain.geojson and frozen.json into ``out``."""
    assert check.domain is not None
    fields = writers.fields_dataset(result.years, result.estimate, result.sd,
                                    options.thresholds, grid, check.domain, result.casts)
    frozen = {"projection": check.domain.crs.srs, "grid_km": options.grid_km,
              "domain_source": check.domain_source,
              "variogram_family": result.family if result.family in FAMILIES else None,
              "family_scores_rmse_c": result.family_scores or None}
    written = [
        writers.write_csv(check.qc.table.drop(columns=["doy"]).reindex(
            columns=["row", "year", "station", "lat", "lon", "bottom_c", "flag", "detail"]),
            out / "qc.csv"),
        writers.write_csv(result.table, out / "indices.csv"),
        writers.write_netcdf(fields, out / "fields.nc"),
        writers.write_json(check.domain.to_geojson(), out / DOMAIN_NAME),
        writers.write_json(frozen, out / FROZEN_NAME),
    ]
    return written, frozen


def run_check(casts_path: Path, mapping: Mapping[str, str] | None = None,
              domain_path: Path | None = None, options: IndexOptions | None = None,
              previous_out: Path | None = None, derive: bool = False) -> CheckRun:
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

    Returns
    -------
    CheckRun
        QC result and the domain used.
    """
    opts = options or IndexOptions()
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
    return CheckRun(qc=qc, domain=domain, domain_source=source)


def run_index(casts_path: Path, out: Path, options: IndexOptions,
              mapping: Mapping[str, str] | None = None, domain_path: Path | None = None,
              bathymetry_path: Path | None = None,
              progress: Callable[[int], None] | None = None,
              on_start: Callable[[int], None] | None = None) -> IndexRun:
    """Compute the indices and write ``indices.csv``, ``fields.nc`` and companions.

    Every result is computed before the first file is written; each file is
    written atomically.

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

    Returns
    -------
    IndexRun
        Results, notes and the files written.
    """
    writers.prepare_out_dir(out)
    frozen = _frozen(out)
    check = run_check(casts_path, mapping, domain_path, options, previous_out=out, derive=True)
    assert check.domain is not None
    if check.qc.casts.empty:
        raise InputError(f"{casts_path} has no usable casts; run coldindex check to see why.")
    bathy = readers.read_bathymetry(bathymetry_path) if bathymetry_path else None
    grid = make_grid(check.domain, options.grid_km)
    frozen_family = frozen.get("variogram_family") if options.variogram == "auto" else None
    notes = []
    if frozen_family:
        notes.append(f"variogram family {frozen_family} reused from {out / FROZEN_NAME}")
    if on_start is not None:
        on_start(int(check.qc.casts["year"].nunique()))
    result = compute_indices(check.qc.casts, check.domain, grid, options, bathy,
                             frozen_family=frozen_family, progress=progress)
    if result.clipped_share > 0:
        notes.append(f"circulant embedding clipped {result.clipped_share:.2e} of the "
                     "eigenvalue mass")

    written, frozen_out = _write_index_outputs(out, check, result, grid, options)
    inputs = {"casts": {"path": str(casts_path), "sha256": writers.sha256_file(casts_path)}}
    for name, p in (("domain", domain_path), ("bathymetry", bathymetry_path)):
        if p is not None:
            inputs[name] = {"path": str(p), "sha256": writers.sha256_file(p)}
    provenance = {
        "tool": "coldindex", "version": __version__, "command": "index",
        "python": platform.python_version(),
        "created_utc": dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds"),
        "parameters": asdict(options), "column_mapping": dict(mapping or {}),
        "inputs": inputs, "casts_sha256_by_year": year_hashes(check.qc.table),
        "frozen": frozen_out,
        "outputs": {p.name: writers.sha256_file(p) for p in written},
    }
    written.append(writers.write_json(provenance, out / "provenance.json"))
    return IndexRun(check=check, result=result, written=written, notes=notes)


# --------------------------------------------------------------------------------------
# The annual update: one validated config -> a whole release.
# --------------------------------------------------------------------------------------

RELEASE_FORMAT = 1
UPDATE_STAGES = ("check", "index", "classify", "shifts", "skill", "project", "covariates",
                 "revisions", "figures", "report")
CAUTIONS = ("These indicators are decision support. They rest on stated assumptions (a "
            "Gaussian, stationary bottom-temperature field around a constant mean or a depth "
            "trend; one variogram family for all years; AR(1) red noise for the shift and "
            "skill tests) and carry interpolation uncertainty only. Where they feed "
            "management advice, defer to the responsible agency's reviewed assessment.")


@dataclass
class UpdateRun:
    """Outcome of ``coldindex update``: the release folder and what it says."""

    release: Path
    headlines: list[str]
    notes: list[str] = field(default_factory=list)


def _release_number(out: Path) -> int:
    nums = [int(p.name.split("-")[1]) for p in out.glob("release-*")
            if p.is_dir() and p.name.split("-")[1].isdigit()]
    return max(nums, default=0) + 1


def _previous_release(out: Path, previous: Path | None) -> Path | None:
    if previous is not None:
        if not (previous / "provenance.json").is_file():
            raise InputError(f"{previous} is not a coldindex release (no provenance.json); "
                             "give a release folder with --previous.")
        prev = previous
    else:
        pointer = out / "latest"
        if not pointer.is_file():
            return None
        prev = out / pointer.read_text(encoding="utf-8").strip()
        if not (prev / "provenance.json").is_file():
            raise InputError(f"{pointer} names {prev.name}, which is not a complete release; "
                             "give --previous or remove the pointer.")
    prov = json.loads((prev / "provenance.json").read_text(encoding="utf-8"))
    if prov.get("release_format") != RELEASE_FORMAT:
        raise InputError(f"{prev} was written by coldindex {prov.get('version', '?')} in an "
                         "incompatible release format; start a new output folder or give "
                         "--previous with a compatible release.")
    return prev


def _check_paths(cfg: Config, out: Path) -> None:
    from coldindex.errors import ConfigError

    if cfg.inputs.casts is None:
        raise ConfigError("inputs.casts needs to be set: the path of the casts file.")
    files = {"inputs.casts": cfg.inputs.casts, "inputs.domain": cfg.inputs.domain,
             "inputs.bathymetry": cfg.inputs.bathymetry, "inputs.ice": cfg.inputs.ice,
             **{f"inputs.trajectories[{k}]": p for k, p in enumerate(cfg.inputs.trajectories)}}
    for key, p in files.items():
        if p is not None and not p.is_file():
            raise ConfigError(f"{key} names {p}, which does not exist; fix the path (relative "
                              "to the config file).")
    out_abs = out.resolve()
    for key, p in files.items():
        if p is not None and out_abs.is_relative_to(p.resolve().parent):
            raise ConfigError(f"The output folder {out} lies inside the folder of {key} "
                              f"({p.parent}); choose an output folder outside the inputs.")


def covariates_table(indices: pd.DataFrame, columns: tuple[str, ...], lags: tuple[int, ...],
                     reference: tuple[int, int] | None) -> pd.DataFrame:
    """The assessor's covariates: each index, its uncertainty, its z-score and lagged copies.

    ``<col>_lag1`` on the row of year Y holds the value of year Y - 1 (aligned by year,
    so a missing year gives a blank, never a shifted value).
    """
    t = indices.set_index("year")
    years = np.arange(int(t.index.min()), int(t.index.max()) + 1)
    t = t.reindex(years)
    out = pd.DataFrame({"year": years})
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
        out[col + "_z"] = (v - float(np.mean(ref))) / sd if sd > 0 else np.nan
    for col in columns:
        for lag in lags:
            out[f"{col}_lag{lag}"] = pd.Series(out[col].to_numpy(), index=years).reindex(
                years - lag).to_numpy()
            out[f"{col}_z_lag{lag}"] = pd.Series(out[col + "_z"].to_numpy(),
                                                 index=years).reindex(years - lag).to_numpy()
    return out


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
    pa, pb = prev_prov.get("parameters", {}), cur_prov.get("parameters", {})
    changed = sorted(k for k in set(pa) | set(pb) if pa.get(k) != pb.get(k))
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

    The release is written under a temporary name inside ``out`` and renamed to
    ``release-<n>`` when complete; ``out/latest`` then names it. A failure
    leaves no new release and the earlier ones intact.

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

    writers.prepare_out_dir(out)
    _check_paths(cfg, out)
    prev = _previous_release(out, previous)
    n = _release_number(out)
    tmp = out / f".release-{n}.partial"
    if tmp.exists():
        shutil.rmtree(tmp)
    tmp.mkdir()
    try:
        headlines, notes = _build_release(cfg, tmp, prev, progress)
        final = out / f"release-{n}"
        os.replace(tmp, final)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    pointer_tmp = out / ".latest.tmp"
    pointer_tmp.write_text(final.name + "\n", encoding="utf-8")
    os.replace(pointer_tmp, out / "latest")
    return UpdateRun(release=final, headlines=headlines, notes=notes)


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

    assert cfg.inputs.casts is not None
    notes: list[str] = []
    headlines: list[str] = []
    written: list[Path] = []
    opts = cfg.index

    _stage(progress, "check")
    check = run_check(cfg.inputs.casts, cfg.columns, cfg.inputs.domain, opts,
                      previous_out=prev, derive=True)
    assert check.domain is not None
    if check.qc.casts.empty:
        raise InputError(f"{cfg.inputs.casts} has no usable casts; run coldindex check.")

    _stage(progress, "index")
    frozen_prev = _frozen(prev)
    family = frozen_prev.get("variogram_family") if opts.variogram == "auto" else None
    if family:
        notes.append(f"variogram family {family} reused from {prev}")
    grid = make_grid(check.domain, opts.grid_km)
    bathy = readers.read_bathymetry(cfg.inputs.bathymetry) if cfg.inputs.bathymetry else None
    res = compute_indices(check.qc.casts, check.domain, grid, opts, bathy, frozen_family=family)
    indices = res.table
    index_files, frozen = _write_index_outputs(rel, check, res, grid, opts)
    written += index_files
    series = {c: pd.Series(indices[c].to_numpy(float), index=indices["year"].to_numpy())
              for c in indices.columns if c not in ("year", "variogram", "note")}

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
        min_size=sc.min_size, boot=sc.boot, seed=sc.seed))
    written.append(writers.write_csv(shifts.shifts, rel / "shifts.csv"))
    written.append(writers.write_csv(shifts.regimes, rel / "regimes.csv"))

    _stage(progress, "skill")
    ol = skill_tab = hc = None
    if cfg.inputs.ice is not None:
        kc = cfg.skill
        ice = sk.ice_frame(readers.read_ice(cfg.inputs.ice, cfg.ice_columns), str(cfg.inputs.ice))
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
    cov = covariates_table(indices, cfg.covariates.columns, cfg.covariates.lags,
                           cl.parse_reference(cfg.covariates.reference or None))
    written.append(writers.write_csv(cov, rel / "covariates.csv"))

    _stage(progress, "revisions")
    inputs = {"casts": writers.sha256_file(cfg.inputs.casts)}
    for name in ("domain", "bathymetry", "ice"):
        p = getattr(cfg.inputs, name)
        if p is not None:
            inputs[name] = writers.sha256_file(p)
    for k, p in enumerate(cfg.inputs.trajectories):
        inputs[f"trajectories[{k}]"] = writers.sha256_file(p)
    prov: dict = {"tool": "coldindex", "version": __version__, "release_format": RELEASE_FORMAT,
                  "config": _config_dict(cfg), "parameters": asdict(opts),
                  "inputs_sha256": inputs,
                  "casts_sha256_by_year": year_hashes(check.qc.table), "frozen": frozen,
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
    written.append(writers.write_csv(revisions, rel / "revisions.csv"))

    _stage(progress, "figures")
    figs = {}
    pairs = [("bottom_mean_c", "mean bottom temperature (°C)")]
    area_col = next((c for c in cfg.classify.columns if c.startswith("below_")), None)
    if area_col:
        pairs.append((area_col, f"{area_col} (km²)"))
    figs["series"] = fg.series_figure(indices, pairs, classes, shifts.regimes)
    ok_years = [y for y, note in zip(res.years, indices["note"].fillna(""), strict=True)
                if not str(note).startswith("no indices")][-cfg.report.map_years:]
    idx = [res.years.index(y) for y in ok_years]
    outline = [np.asarray(r.coords) for p in getattr(check.domain.polygon_xy, "geoms",
                                                      [check.domain.polygon_xy])
               for r in [p.exterior]]
    cast_xy = [res.casts.loc[res.casts["year"] == y, ["x_km", "y_km"]].to_numpy()
               for y in ok_years]
    figs["maps"] = fg.maps_figure(ok_years, grid.to_2d(res.estimate[idx]), grid.x, grid.y,
                                  outline, cast_xy)
    if skill_tab is not None and hc is not None and ol is not None:
        figs["skill"] = fg.skill_figure(skill_tab)
        figs["hindcast"] = fg.hindcast_figure(hc.table, ol, cfg.skill.column)
    if proj is not None:
        figs["projection"] = fg.projection_figure(proj.projection, proj.emergence)
    pngs: dict[str, bytes] = {}
    for name, fig in figs.items():
        written.append(writers.write_figure(fig, rel / "figures" / f"{name}.svg", close=False))
        written.append(writers.write_figure(fig, rel / "figures" / f"{name}.png"))
        pngs[name] = (rel / "figures" / f"{name}.png").read_bytes()

    _stage(progress, "report")
    headlines = _headlines(indices, classes, cuts, shifts.shifts, sc, ol, proj, revisions,
                           cfg)
    page = _report_page(cfg, indices, classes, shifts, skill_tab, proj, revisions, check,
                        pngs, headlines, prov)
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
                f"{cls.iloc[0]} year by {main} ({last[main]:.3g} {unit}; the "
                f"{_ordinal(rank)} coldest of {len(valid)} years)")
        if len(valid) > 1:
            prev = valid.iloc[-2]
            text += (f", {last[main] - prev[main]:+.3g} {unit} from {int(prev['year'])}")
        out.append(text + ".")
    sig = shifts[shifts["p_value"] < sc.alpha]
    if len(sig):
        items = ", ".join(f"{r.method.upper()} {r.year} ({r.mean_before:.3g} -> "
                          f"{r.mean_after:.3g}, p = {r.p_value:.3f})"
                          for r in sig.itertuples())
        out.append(f"Regime shifts in {sc.column} that survive the red-noise test: {items}.")
    else:
        out.append(f"No regime shift in {sc.column} survives the red-noise test.")
    if ol is not None:
        from coldindex.skill import outlook_sentence

        out.append("Outlook: " + outlook_sentence(ol, cfg.skill.column))
    if proj is not None:
        out += proj.summaries
    out.append(f"{len(revisions)} past values changed since the previous release."
               if len(revisions) else "No past value changed since the previous release.")
    return out


def _ordinal(n: int) -> str:
    suffix = "th" if 10 <= n % 100 <= 20 else {1: "st", 2: "nd", 3: "rd"}.get(n % 10, "th")
    return f"{n}{suffix}"


def _report_page(cfg: Config, indices: pd.DataFrame, classes: pd.DataFrame,
                 shifts: ShiftResult, skill_tab: pd.DataFrame | None,
                 proj: ProjectionResult | None,
                 revisions: pd.DataFrame, check: CheckRun, pngs: dict[str, bytes],
                 headlines: list[str], prov: dict) -> str:
    from coldindex.report.html import render, table_html

    t = table_html
    cols = ["year", "n_casts", "coverage", "bottom_mean_c",
            *[c for c in indices.columns if c.startswith("below_") and c.count("_") == 2],
            "cv_rmse_c", "note"]
    qc_counts = check.qc.table["flag"].value_counts().rename_axis("flag").reset_index(
        name="casts")
    sections = [
        ("Indices", "<p>Expected areas below each threshold (km²), the area-weighted mean "
         "bottom temperature (°C), coverage and cross-validation error per year.</p>"
         "{{figure:series}}" + t(indices[[c for c in cols if c in indices]])),
        ("Bottom-temperature maps", "<p>Kriged bottom temperature of the latest years (smooth "
         "process), the 2 °C contour, the casts used and the domain outline.</p>"
         "{{figure:maps}}"),
        ("Year classes", t(classes.pivot(index="year", columns="column", values="class")
                           .reset_index())),
        ("Regime shifts", t(shifts.shifts) + t(shifts.regimes)),
    ]
    if skill_tab is not None:
        sections.append(("Ice skill and outlook", "{{figure:skill}}{{figure:hindcast}}"
                         + t(skill_tab.sort_values("q_value").head(12))))
    if proj is not None:
        sections.append(("Projections", "{{figure:projection}}"
                         + t(proj.emergence)))
    sections += [
        ("Revisions", t(revisions) if len(revisions) else
         "<p>No past value changed beyond the tolerance.</p>"),
        ("Quality control", f"<p>Domain: {check.domain_source}.</p>" + t(qc_counts)),
        ("Methods", "<p>Ordinary kriging (or kriging with a depth drift) of each year's casts "
         "on a fixed equal-area grid (Isaaks &amp; Srivastava 1989), leave-one-out "
         "cross-validation (Dubrule 1983), conditional simulation by circulant embedding "
         "(Dietrich &amp; Newsam 1997); STARS (Rodionov 2004) and PELT (Killick et al. 2012) "
         "with a red-noise bootstrap of the whole detection; ice skill with Bretherton et al. "
         "(1999) effective sample sizes, Benjamini &amp; Hochberg (1995) q-values and "
         "Williams' t (Steiger 1980); quantile delta mapping (Cannon et al. 2015). Details "
         "and assumptions: docs/methods.md of the coldindex distribution.</p>"),
    ]
    inputs = "".join(f"<li><code>{k}</code> sha256 {v}</li>"
                     for k, v in prov["inputs_sha256"].items())
    provenance = (f"<p>coldindex {prov['version']}; Python {prov['versions']['python']}, "
                  f"numpy {prov['versions']['numpy']}. Inputs:</p><ul>{inputs}</ul>"
                  "<p>The run time and per-output checksums are in provenance.json.</p>")
    return render(cfg.report.title, headlines, sections, pngs, CAUTIONS, provenance)
