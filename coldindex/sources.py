"""Runs from the raw sources: profiles to the casts table, ice fields to the ice series.

Shared by the commands (``check``/``index`` with ``--profiles``, ``ice``) and by the
annual update, so a command and the update never differ. Reads through
:mod:`coldindex.io`, computes with :mod:`coldindex.profiles` and
:mod:`coldindex.icefields`, writes through :mod:`coldindex.io.writers`; never prints.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr

from coldindex._version import __version__
from coldindex.config import Config, IceFieldsOptions, IndexOptions, ProfileOptions
from coldindex.domain import Domain, sample_lonlat_grid
from coldindex.errors import InputError
from coldindex.icefields import monthly_table, region_weights, regional_sums, series_for_skill
from coldindex.io import readers, writers
from coldindex.io.icefields import open_ice_fields, read_regions
from coldindex.io.profiles import read_profiles
from coldindex.profiles import bottom_values

ICE_OUTPUTS = ("ice_fields.csv", "ice_fields.json")


def profile_casts(path: Path, mapping: Mapping[str, str] | None, options: ProfileOptions,
                  index_options: IndexOptions | None = None,
                  bathymetry_path: Path | None = None) -> pd.DataFrame:
    """Read a profiles file and return its casts table (strings, ``row``, provenance).

    Parameters
    ----------
    path
        Profiles: CF DSG NetCDF or a long CSV/Parquet table.
    mapping
        Header mapping of a long table (``--profile-columns``).
    options
        Profile settings (``[profiles]``).
    index_options
        For the freezing-point tolerance and default salinity.
    bathymetry_path
        Bathymetry NetCDF for casts without a recorded bottom depth.

    Returns
    -------
    pandas.DataFrame
        See :data:`coldindex.schema.CASTS_FROM_PROFILES`.
    """
    opts = index_options or IndexOptions()
    data = read_profiles(path, mapping)
    if data.casts.empty:
        raise InputError(f"{path} holds no profile; check the file.")
    floor = None
    if bathymetry_path is not None and (~np.isfinite(data.casts["bottom_depth_m"])).any():
        lon_axis, lat_axis, depth = readers.read_bathymetry(bathymetry_path)
        floor = pd.Series(sample_lonlat_grid(lon_axis, lat_axis, depth,
                                             data.casts["lon"].to_numpy(float),
                                             data.casts["lat"].to_numpy(float)),
                          index=data.casts["cast"].to_numpy())
    return bottom_values(data.samples, data.casts, options, floor,
                         freeze_tolerance_c=opts.freeze_tolerance_c,
                         default_salinity=opts.default_salinity).casts


@dataclass
class IceResult:
    """The monthly ice table and the record of how it was made."""

    table: pd.DataFrame
    record: dict
    written: list[Path] = field(default_factory=list)


def ice_table(paths: Sequence[Path], regions: Mapping[str, Domain],
              options: IceFieldsOptions) -> IceResult:
    """Monthly area, extent, volume and mass of every region from gridded ice fields.

    Files are read one at a time, lazily, in chunks of a month of time steps, so a
    long daily record streams in bounded memory. All files must share one grid.

    Parameters
    ----------
    paths
        NetCDF files of ice fields (any order; time steps are sorted).
    regions
        Regions by name.
    options
        ``[ice_fields]`` settings.

    Returns
    -------
    IceResult
        The tidy table (:data:`coldindex.schema.ICE_FIELDS`) and a record of inputs,
        region areas and the thickness reading.
    """
    if not paths:
        raise InputError("No ice-field file given; name at least one NetCDF file.")
    readers.refuse_repeated_files(list(paths), "ice fields")
    weights = None
    key = None
    pieces: list[tuple[np.ndarray, np.ndarray, xr.Dataset]] = []
    floe: set[bool] = set()
    has_thickness: set[bool] = set()
    seen: dict[object, Path] = {}
    for p in sorted(paths, key=str):
        f = open_ice_fields(p, options.thickness)
        try:
            if key is None:
                key = f.grid_key
                weights = region_weights(f.cells, regions)
                empty = [w.name for w in weights if w.area_km2 <= 0]
                if empty:
                    raise InputError(f"{p}: the grid does not reach the region "
                                     f"{empty[0]!r}; give fields that cover it (or check "
                                     "the region's coordinates, lon then lat).")
            elif f.grid_key != key:
                raise InputError(f"{p} is on another grid than {sorted(paths, key=str)[0]}; "
                                 "give fields on one grid (or run coldindex ice per grid).")
            assert weights is not None
            has_thickness.add(f.thickness is not None)
            floe.add(f.floe_thickness)
            sums = regional_sums(f.concentration, f.thickness, weights,
                                 floe_thickness=f.floe_thickness,
                                 extent_threshold=options.extent_threshold,
                                 density_kg_m3=options.density_kg_m3).compute()
            pieces.append((f.years, f.months, sums))
            for stamp in np.asarray(f.concentration["time"].values).tolist():
                if stamp in seen:
                    raise InputError(f"{p} and {seen[stamp]} both hold the time step {stamp}; "
                                     "give each time step once (overlapping files would "
                                     "count it twice).")
                seen[stamp] = p
        finally:
            f.close()
    if len(has_thickness) > 1:
        raise InputError("Some ice-field files hold thickness and some do not; give all with "
                         "thickness or all without.")
    years = np.concatenate([y for y, _, _ in pieces])
    months = np.concatenate([m for _, m, _ in pieces])
    sums = xr.concat([s for _, _, s in pieces], dim="time")
    table = monthly_table(sums, years, months)
    assert weights is not None
    record = {
        "tool": "coldindex", "version": __version__, "command": "ice",
        "inputs": {str(p): writers.sha256_file(p) for p in sorted(paths, key=str)},
        "regions": {w.name: {"area_km2": round(w.area_km2, 3),
                             "region_polygon_km2": round(regions[w.name].area_km2, 3)}
                    for w in weights},
        "options": options.model_dump(mode="json"),
        "thickness": (None if not any(has_thickness) else
                      "floe thickness (times concentration)" if floe == {True}
                      else "mean over the cell (not times concentration)"),
        "time_steps": int(len(years)),
    }
    return IceResult(table=table, record=record)


def run_ice(paths: Sequence[Path], regions_path: Path, out: Path,
            options: IceFieldsOptions) -> IceResult:
    """``coldindex ice``: write ``ice_fields.csv`` and ``ice_fields.json`` into ``out``.

    Outputs are checked before any work, computed fully, then staged and replaced
    together (:class:`coldindex.io.writers.OutputSet`).
    """
    outputs = writers.plan_outputs(out, "ice", ICE_OUTPUTS, [*paths, regions_path],
                                   option="--out")
    regions = read_regions(regions_path)
    res = ice_table(paths, regions, options)
    res.record["regions_file"] = {"path": str(regions_path),
                                  "sha256": writers.sha256_file(regions_path)}
    res.record["created_utc"] = dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds")
    with outputs as stage:
        writers.write_table(res.table, stage.path("ice_fields.csv"))
        writers.write_json(res.record, stage.path("ice_fields.json"))
    res.written = stage.written
    return res


def release_ice_series(cfg: Config, domain: Domain, rel: Path) -> tuple[pd.DataFrame,
                                                                         list[Path]]:
    """The update's ice from gridded fields: write the table, return the skill series.

    Regions come from ``inputs.ice_regions``, else the survey domain (region name
    ``domain``); ``ice_fields.quantity`` and ``ice_fields.region`` pick the series.

    Parameters
    ----------
    cfg
        The validated configuration (``inputs.ice_fields`` set).
    domain
        The survey domain of this release.
    rel
        The partial release folder.

    Returns
    -------
    tuple
        ``(ice, written)``: ``year``, ``month``, ``ice`` for the skill stage, and the
        files written (``ice_fields.csv``, ``ice_fields.json``).
    """
    regions = (read_regions(cfg.inputs.ice_regions) if cfg.inputs.ice_regions is not None
               else {"domain": domain})
    res = ice_table(cfg.inputs.ice_fields, regions, cfg.ice_fields)
    base = cfg.source.parent if cfg.source else Path(".")
    res.record["inputs"] = {_relative(Path(k), base): v for k, v in res.record["inputs"].items()}
    written = [writers.write_table(res.table, rel / "ice_fields.csv"),
               writers.write_json(res.record, rel / "ice_fields.json")]
    return series_for_skill(res.table, cfg.ice_fields.quantity, cfg.ice_fields.region), written


def _relative(p: Path, base: Path) -> str:
    try:
        return str(p.resolve().relative_to(base.resolve()))
    except ValueError:
        return str(p)
