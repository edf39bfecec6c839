"""Runs that tie readers, computation and writers together.

``run_check`` and ``run_index`` serve the single commands; the annual update
(every stage into one release) grows here. Nothing in this module prints: the
CLI passes a progress callback and prints what comes back.
"""

from __future__ import annotations

import datetime as dt
import json
import platform
from collections.abc import Callable, Mapping
from dataclasses import asdict, dataclass, field
from pathlib import Path

from coldindex._version import __version__
from coldindex.config import IndexOptions
from coldindex.domain import Domain, derive_domain, make_grid
from coldindex.errors import InputError
from coldindex.indices import IndexResult, compute_indices
from coldindex.io import readers, writers
from coldindex.qc import QCResult, run_qc, year_hashes

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


def _frozen(out: Path | None) -> dict:
    if out is None or not (out / FROZEN_NAME).is_file():
        return {}
    try:
        return json.loads((out / FROZEN_NAME).read_text(encoding="utf-8"))
    except json.JSONDecodeError:
        raise InputError(f"{out / FROZEN_NAME} is damaged; delete it to choose the domain and "
                         "variogram family afresh (past values may move).") from None


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

    fields = writers.fields_dataset(result.years, result.estimate, result.sd,
                                    options.thresholds, grid, check.domain, result.casts)
    written = [
        writers.write_csv(result.table, out / "indices.csv"),
        writers.write_netcdf(fields, out / "fields.nc"),
        writers.write_csv(check.qc.table.drop(columns=["doy"]).reindex(
            columns=["row", "year", "station", "lat", "lon", "bottom_c", "flag", "detail"]),
            out / "qc.csv"),
        writers.write_json(check.domain.to_geojson(), out / DOMAIN_NAME),
    ]
    frozen_out = {"projection": check.domain.crs.srs, "grid_km": options.grid_km,
                  "domain_source": check.domain_source,
                  "variogram_family": result.family if result.family in
                  ("exponential", "spherical", "matern", "gaussian") else None,
                  "family_scores_rmse_c": result.family_scores or None}
    written.append(writers.write_json(frozen_out, out / FROZEN_NAME))
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
