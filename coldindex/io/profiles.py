"""Reader of profile data: CF discrete-sampling-geometry NetCDF and long tables.

NetCDF files follow CF's discrete sampling geometries (``featureType =
"profile"``) in any of the four layouts: contiguous ragged arrays (a count
variable with ``sample_dimension``), indexed ragged arrays (an index variable
with ``instance_dimension``), orthogonal multidimensional arrays (one vertical
axis shared by all profiles) and incomplete multidimensional arrays (a vertical
coordinate per profile, padded with missing values). Variables are found by
``standard_name``: ``sea_water_temperature`` (in-situ), one of
``sea_water_pressure`` (atmosphere included: one standard atmosphere, 10.1325
dbar, is subtracted), ``sea_water_pressure_due_to_sea_water`` or ``depth``, and
optionally ``sea_water_practical_salinity`` and ``sea_floor_depth_below_sea_surface``.

Long tables (CSV or Parquet) hold one sample a row; see
:data:`coldindex.schema.PROFILES`. Their ``pressure_dbar`` is sea pressure (as
CTD software writes it). A table's row order is not taken as the order along the
profile: samples are sorted by depth (or pressure) within each cast.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr

from coldindex.errors import InputError
from coldindex.io.readers import DATE_FORMAT_OPTION, _check_file, read_table
from coldindex.profiles import ATMOSPHERE_DBAR
from coldindex.schema import PROFILES, numeric_column

NETCDF_SUFFIXES = (".nc", ".nc4", ".cdf", ".netcdf")
PRESSURE_NAMES = ("sea_water_pressure_due_to_sea_water", "sea_water_pressure")
FLOOR_NAMES = ("sea_floor_depth_below_sea_surface", "sea_floor_depth_below_geoid",
               "sea_floor_depth_below_mean_sea_level")


@dataclass(frozen=True)
class ProfileData:
    """Profiles as read: samples and casts.

    Attributes
    ----------
    samples
        ``cast``, ``sample`` (0-based order along the profile as stored),
        ``temperature_c``, ``depth_m`` or ``pressure_dbar`` (sea pressure; the
        other NaN), ``salinity``.
    casts
        ``cast``, ``station``, ``time`` (datetime64), ``lat``, ``lon``,
        ``bottom_depth_m`` (NaN where not recorded), ``year`` (NaN where not given).
    vertical
        What the file gave: ``depth``, ``sea pressure`` or ``pressure (atmosphere
        subtracted)``.
    """

    samples: pd.DataFrame
    casts: pd.DataFrame
    vertical: str


def read_profiles(path: Path, mapping: Mapping[str, str] | None = None, *,
                  decimal: str | None = None, date_format: str | None = None) -> ProfileData:
    """Read a profiles file: NetCDF (by suffix) or a CSV/Parquet long table.

    Parameters
    ----------
    path
        The file.
    mapping
        Header mapping ``{ours: theirs}`` of a long table (``--profile-columns``).
    decimal, date_format
        For a long table: the decimal mark and date format (None detects them), as in
        :func:`coldindex.io.readers.read_table`.

    Returns
    -------
    ProfileData
        Samples and casts.
    """
    _check_file(path)
    if path.suffix.lower() in NETCDF_SUFFIXES:
        return _read_dsg(path)
    return _read_long_table(path, mapping or {}, decimal=decimal, date_format=date_format)


# --------------------------------------------------------------------------------------
# Long tables
# --------------------------------------------------------------------------------------

def _read_long_table(path: Path, mapping: Mapping[str, str], *, decimal: str | None,
                     date_format: str | None) -> ProfileData:
    raw = read_table(path, PROFILES, mapping, "--profile-columns", decimal=decimal,
                     date_format=date_format)
    has_depth, has_p = "depth_m" in raw.columns, "pressure_dbar" in raw.columns
    if not (has_depth or has_p):
        raise InputError(f"{path} has neither a depth_m nor a pressure_dbar column; map one "
                         "with --profile-columns depth_m=YOUR_HEADER (or pressure_dbar=...).")
    src = str(path)
    num = {c: numeric_column(raw, c, src, allow_blank=c not in ("lat", "lon"))
           for c in (col.name for col in PROFILES.columns if col.kind == "float")
           if c in raw.columns}
    cast = raw["cast"].astype(str).str.strip()
    if cast.eq("").any():
        r = raw.loc[cast.eq(""), "row"].iloc[0]
        raise InputError(f"{path}, row {r}: column 'cast' is blank; give every sample its "
                         "cast id.")
    when = pd.to_datetime(raw["time"].where(raw["time"].str.len() > 0), errors="coerce",
                          format="mixed", utc=True).dt.tz_localize(None)
    if when.isna().any():
        r = raw.loc[when.isna(), "row"].iloc[0]
        raise InputError(f"{path}, row {r}: column 'time' holds "
                         f"{raw.loc[when.isna(), 'time'].iloc[0]!r}, not a date or time; "
                         "write ISO 8601 (YYYY-MM-DD or YYYY-MM-DDTHH:MM:SS) or give the "
                         "date format ({option}).", option=DATE_FORMAT_OPTION)
    per_cast = pd.DataFrame({"cast": cast, "time": when, "lat": num["lat"], "lon": num["lon"],
                             "row": raw["row"]})
    per_cast["station"] = raw["station"].astype(str).str.strip() if "station" in raw else ""
    per_cast["bottom_depth_m"] = num.get("bottom_depth_m", np.nan)
    per_cast["year"] = (numeric_column(raw, "year", src, whole=True, allow_blank=True)
                        if "year" in raw else np.nan)
    keys = ["time", "lat", "lon", "station", "bottom_depth_m", "year"]
    firsts = per_cast.groupby("cast", sort=True).first()
    for col in keys:
        n = per_cast.groupby("cast")[col].nunique(dropna=True)
        if (n > 1).any():
            bad = n[n > 1].index[0]
            rows = per_cast.loc[per_cast["cast"] == bad, "row"].head(3).tolist()
            raise InputError(f"{path}, rows {', '.join(map(str, rows))}: cast {bad!r} holds "
                             f"more than one {col}; a cast has one {col} (give repeat casts "
                             "their own cast id).")
    casts = firsts.drop(columns="row").reset_index()
    samples = pd.DataFrame({
        "cast": cast,
        "temperature_c": num["temperature_c"],
        "depth_m": num.get("depth_m", np.nan),
        "pressure_dbar": num.get("pressure_dbar", np.nan),
        "salinity": num.get("salinity", np.nan),
    })
    # A table row order is no acquisition order: samples go down the profile by depth (or
    # pressure), ties by their values, so reordering rows changes nothing; a repeated depth
    # is then not deeper than the one before and is flagged non_monotonic.
    vertical_key = samples["depth_m"].fillna(samples["pressure_dbar"])
    order = samples.assign(_v=vertical_key).sort_values(
        ["cast", "_v", "temperature_c", "salinity"], kind="stable", na_position="last")
    samples = order.drop(columns="_v").reset_index(drop=True)
    samples.insert(1, "sample", samples.groupby("cast").cumcount().to_numpy())
    vertical = "depth" if has_depth else "sea pressure"
    return ProfileData(samples=samples, casts=casts, vertical=vertical)


# --------------------------------------------------------------------------------------
# CF discrete sampling geometries
# --------------------------------------------------------------------------------------

def _by_standard_name(ds: xr.Dataset, names: tuple[str, ...]) -> str | None:
    for want in names:
        for name, var in ds.variables.items():
            if str(var.attrs.get("standard_name", "")).strip() == want:
                return str(name)
    return None


def _unit_factor(units: str, kind: str, path: Path, var: str) -> tuple[float, float]:
    """(scale, offset) turning a variable's units into ours; refuse unknown units."""
    u = units.strip().lower().replace(" ", "")
    tables: dict[str, dict[str, tuple[float, float]]] = {
        "temperature": {"degc": (1, 0), "celsius": (1, 0), "degree_celsius": (1, 0),
                        "degrees_celsius": (1, 0), "deg_c": (1, 0), "k": (1, -273.15),
                        "kelvin": (1, -273.15)},
        "pressure": {"dbar": (1, 0), "decibar": (1, 0), "decibars": (1, 0), "db": (1, 0),
                     "bar": (10, 0), "pa": (1e-4, 0), "kpa": (0.1, 0), "hpa": (0.01, 0)},
        "depth": {"m": (1, 0), "meter": (1, 0), "meters": (1, 0), "metre": (1, 0),
                  "metres": (1, 0), "km": (1000, 0), "cm": (0.01, 0)},
        "salinity": {"": (1, 0), "1": (1, 0), "psu": (1, 0), "pss-78": (1, 0),
                     "0.001": (1, 0), "1e-3": (1, 0)},
    }
    table = tables[kind]
    if u not in table:
        raise InputError(f"{path}: variable {var!r} has units {units!r}, which coldindex "
                         f"cannot convert for {kind}; use one of "
                         f"{', '.join(k for k in table if k)}.")
    scale, offset = table[u]
    return float(scale), float(offset)


def _values(ds: xr.Dataset, name: str, kind: str, path: Path) -> xr.DataArray:
    da = ds[name]
    scale, offset = _unit_factor(str(da.attrs.get("units", "")), kind, path, name)
    out = da.astype(float) * scale + offset
    out.attrs = da.attrs
    return out


FALLBACKS = {"latitude": ("units", ("degrees_north", "degree_north")),
             "longitude": ("units", ("degrees_east", "degree_east")),
             "time": ("axis", ("T",))}


def _per_profile(ds: xr.Dataset, standard: tuple[str, ...], path: Path,
                 required: bool, what: str) -> xr.DataArray | None:
    name = _by_standard_name(ds, standard)
    if name is None and standard[0] in FALLBACKS:  # no standard_name: units or axis, or name
        attr, values = FALLBACKS[standard[0]]
        name = next((str(n) for n, v in ds.variables.items()
                     if str(v.attrs.get(attr, "")).strip() in values), None)
        if name is None and standard[0] in ds.variables:
            name = standard[0]
    if name is None:
        if required:
            raise InputError(f"{path} has no variable with standard_name {standard[0]!r} "
                             f"({what}); add the attribute to the right variable.")
        return None
    return ds[name]


def _strings(values: np.ndarray) -> np.ndarray:
    return np.array([v.decode("utf-8", "replace").strip() if isinstance(v, bytes)
                     else str(v).strip() for v in np.asarray(values).ravel()], dtype=object)


def _read_dsg(path: Path) -> ProfileData:
    try:
        ds = xr.open_dataset(path, decode_times=True)
    except Exception as exc:  # netCDF backends raise many error types
        raise InputError(f"{path} cannot be read as NetCDF ({type(exc).__name__}); give a "
                         "complete NetCDF file.") from None
    with ds:
        try:
            ds = ds.load()
        except Exception as exc:  # a truncated file fails only when read
            raise InputError(f"{path} cannot be read ({type(exc).__name__}); check that the "
                             "file is complete.") from None
        return _dsg_to_frames(ds, path)


def _dsg_to_frames(ds: xr.Dataset, path: Path) -> ProfileData:
    feature = str(ds.attrs.get("featureType", "")).strip().lower()
    if feature != "profile":
        raise InputError(f"{path} has featureType {ds.attrs.get('featureType', '(none)')!r}; "
                         "coldindex reads CF discrete-sampling-geometry files with "
                         "featureType = \"profile\".")
    t_name = _by_standard_name(ds, ("sea_water_temperature",))
    if t_name is None:
        raise InputError(f"{path} has no variable with standard_name 'sea_water_temperature' "
                         "(in-situ temperature); add the attribute to the temperature "
                         "variable.")
    p_name = _by_standard_name(ds, PRESSURE_NAMES)
    z_name = _by_standard_name(ds, ("depth",))
    if p_name is None and z_name is None:
        raise InputError(f"{path} has no vertical coordinate: no variable with standard_name "
                         "sea_water_pressure, sea_water_pressure_due_to_sea_water or depth.")
    lat = _per_profile(ds, ("latitude",), path, True, "latitude")
    lon = _per_profile(ds, ("longitude",), path, True, "longitude")
    time = _per_profile(ds, ("time",), path, True, "time of each profile")
    assert lat is not None and lon is not None and time is not None
    temp = _values(ds, t_name, "temperature", path)
    if p_name is not None:
        vert = _values(ds, p_name, "pressure", path)
        atmosphere = ds[p_name].attrs.get("standard_name") == "sea_water_pressure"
        if atmosphere:
            vert = vert - ATMOSPHERE_DBAR
        vertical = "pressure (atmosphere subtracted)" if atmosphere else "sea pressure"
    else:
        assert z_name is not None
        vert = _values(ds, z_name, "depth", path)
        if str(ds[z_name].attrs.get("positive", "down")).lower() == "up":
            vert = -vert
        vertical = "depth"
    s_name = _by_standard_name(ds, ("sea_water_practical_salinity",))
    sal = _values(ds, s_name, "salinity", path) if s_name else None
    f_name = _by_standard_name(ds, FLOOR_NAMES)
    floor = _values(ds, f_name, "depth", path) if f_name else None

    prof_dims = lat.dims
    if len(prof_dims) > 1 or lon.dims != prof_dims:
        raise InputError(f"{path}: latitude and longitude must be one value per profile "
                         f"(dimensions {lat.dims} and {lon.dims}).")
    n_prof = int(lat.size)
    pdim = prof_dims[0] if prof_dims else None
    if temp.ndim == 1 and pdim is not None and temp.dims[0] != pdim:
        obs = temp.dims[0]
        count = next((v for v in ds.variables.values()
                      if v.attrs.get("sample_dimension") == obs), None)
        index = next((v for v in ds.variables.values()
                      if v.attrs.get("instance_dimension") == pdim and v.dims == (obs,)), None)
        if count is not None:  # contiguous ragged array
            counts = np.asarray(count.values, dtype=float)
            if (not np.all(np.isfinite(counts)) or counts.sum() != temp.size
                    or (counts < 0).any()):
                raise InputError(f"{path}: the counts of the ragged array add up to "
                                 f"{np.nansum(counts):g}, not to the {temp.size} samples; the "
                                 "file is damaged.")
            prof = np.repeat(np.arange(n_prof), counts.astype(int))
        elif index is not None:  # indexed ragged array
            prof = np.asarray(index.values, dtype=float)
            if not np.all(np.isfinite(prof)) or (prof < 0).any() or (prof >= n_prof).any():
                raise InputError(f"{path}: the profile index variable holds values outside "
                                 f"0..{n_prof - 1}; the file is damaged.")
            prof = prof.astype(int)
        else:
            raise InputError(f"{path}: the samples lie along dimension {obs!r} but no "
                             "variable has sample_dimension or instance_dimension; write a "
                             "CF ragged array (see CF conventions, chapter 9).")
        # order along each profile as stored
        order = pd.Series(prof).groupby(prof).cumcount().to_numpy()
        t_vals = temp.values
        v_vals = np.broadcast_to(vert.values, temp.shape) if vert.dims == temp.dims else None
        if v_vals is None:
            raise InputError(f"{path}: the vertical coordinate and the temperature do not "
                             "share the sample dimension.")
        s_vals = sal.values if sal is not None and sal.dims == temp.dims else None
    elif temp.ndim == 2 or (temp.ndim == 1 and pdim is None):  # multidimensional arrays
        if pdim is None:  # one profile: lat/lon scalars, temperature along z
            t2 = temp.values[None, :]
            zdim = temp.dims[0]
            vert2 = vert.values[None, :] if vert.ndim == 1 else vert.values
            s2 = sal.values[None, :] if sal is not None and sal.ndim == 1 else (
                None if sal is None else sal.values)
            n_prof = 1
        else:
            if pdim not in temp.dims:
                raise InputError(f"{path}: the temperature has dimensions {temp.dims}, none of "
                                 f"them the profile dimension {pdim!r}.")
            zdim = next(d for d in temp.dims if d != pdim)
            t2 = temp.transpose(pdim, zdim).values
            if vert.dims == (zdim,):  # orthogonal: one vertical axis for all
                vert2 = np.broadcast_to(vert.values[None, :], t2.shape)
            elif set(vert.dims) == {pdim, zdim}:  # incomplete: a vertical axis per profile
                vert2 = vert.transpose(pdim, zdim).values
            else:
                raise InputError(f"{path}: the vertical coordinate has dimensions "
                                 f"{vert.dims}; expected ({zdim!r}) or ({pdim!r}, {zdim!r}).")
            s2 = None if sal is None else np.broadcast_to(
                sal.transpose(*[d for d in (pdim, zdim) if d in sal.dims]).values,
                t2.shape) if set(sal.dims) <= {pdim, zdim} else None
        prof = np.repeat(np.arange(n_prof), t2.shape[1])
        order = np.tile(np.arange(t2.shape[1]), n_prof)
        t_vals, v_vals = t2.ravel(), np.asarray(vert2).ravel()
        s_vals = None if s2 is None else np.asarray(s2).ravel()
        keep = np.isfinite(t_vals) | np.isfinite(v_vals)  # padding of incomplete arrays
        prof, order, t_vals, v_vals = prof[keep], order[keep], t_vals[keep], v_vals[keep]
        s_vals = None if s_vals is None else s_vals[keep]
        del zdim
    else:
        raise InputError(f"{path}: the temperature has dimensions {temp.dims}; expected a "
                         "ragged sample dimension or (profile, z).")

    ids_var = next((v for v in ds.variables.values() if v.attrs.get("cf_role") == "profile_id"),
                   None)
    ids = (_strings(ids_var.values) if ids_var is not None
           else np.array([f"profile-{k + 1}" for k in range(n_prof)], dtype=object))
    if len(set(ids)) != len(ids):
        raise InputError(f"{path}: the profile ids (cf_role = profile_id) repeat; give each "
                         "profile its own id.")
    station_var = next((ds[n] for n in ("station", "station_name", "station_id")
                        if n in ds.variables), None)
    stations = (_strings(station_var.values) if station_var is not None
                and station_var.size == n_prof else np.array([""] * n_prof, dtype=object))
    times = pd.to_datetime(np.asarray(time.values).ravel()[:n_prof]
                           if time.size >= n_prof else np.repeat(time.values, n_prof))
    casts = pd.DataFrame({
        "cast": ids, "station": stations, "time": times,
        "lat": np.asarray(lat.values, float).ravel(), "lon": np.asarray(lon.values, float).ravel(),
        "bottom_depth_m": (np.asarray(floor.values, float).ravel() if floor is not None
                           and floor.size == n_prof else np.full(n_prof, np.nan)),
        "year": np.full(n_prof, np.nan),
    })
    samples = pd.DataFrame({"cast": ids[prof], "sample": order, "temperature_c": t_vals})
    if vertical == "depth":
        samples["depth_m"], samples["pressure_dbar"] = v_vals, np.nan
    else:
        samples["depth_m"], samples["pressure_dbar"] = np.nan, v_vals
    samples["salinity"] = s_vals if s_vals is not None else np.nan
    return ProfileData(samples=samples, casts=casts, vertical=vertical)
