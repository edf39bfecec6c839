"""Readers: casts, ice and trajectory tables, domain polygons and bathymetry.

Tables are read as text first (UTF-8, then Latin-1), their delimiter sniffed,
headers mapped to ours (``ours=theirs``), and required columns checked; values
stay strings so that quality control can tell a blank from a non-number.
"""

from __future__ import annotations

import csv
import io
import json
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from coldindex.domain import Domain, domain_from_geojson
from coldindex.errors import InputError, os_error_sentence
from coldindex.schema import CASTS, ICE, TRAJECTORIES, Table

_DELIMITERS = ",;\t|"


OBSERVED_YEARS = (1800, 2300)  # Common practice, no single source: plausible survey years
TRAJECTORY_YEARS = (1800, 2500)  # model runs reach 2300 and beyond; 2500 is a generous cap
MAX_ABS_VALUE = 1e15  # larger magnitudes are corrupt data, not measurements (cap, no source)
SUMMARY_ROW_NAMES = ("ensemble median", "ensemble", "all", "summary")  # rows we add ourselves


def _check_file(path: Path) -> None:
    try:
        if not path.exists():
            raise InputError(f"{path} does not exist; check the path.")
        if path.is_dir():
            raise InputError(f"{path} is a folder, not a file; give the file's path.")
        if path.stat().st_size == 0:
            raise InputError(f"{path} is empty; give a file with a header row and data rows.")
    except OSError as exc:
        raise InputError(os_error_sentence(exc, "reading", path)) from None


def _read_bytes(path: Path) -> bytes:
    try:
        return path.read_bytes()
    except OSError as exc:
        raise InputError(os_error_sentence(exc, "reading", path)) from None


def read_json(path: Path, advice: str, kind: str = "JSON") -> Any:
    """Read a JSON file, or refuse it in one sentence that ends with ``advice``.

    Parameters
    ----------
    path
        The file.
    advice
        What to give instead, e.g. ``"give one Polygon or MultiPolygon"``.
    kind
        What the file should be, for the message (``JSON``, ``GeoJSON``).

    Returns
    -------
    object
        The parsed JSON value.
    """
    _check_file(path)
    try:
        return json.loads(_read_bytes(path).decode("utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise InputError(f"{path} is not valid {kind} ({type(exc).__name__}); {advice}.") \
            from None
    except RecursionError:
        raise InputError(f"{path} is not valid {kind} (nested too deeply to be read); "
                         f"{advice}.") from None


def refuse_repeated_files(paths: Sequence[Path], what: str) -> None:
    """Refuse the same file given twice (same real path or inode), e.g. two model files."""
    from coldindex.io.writers import same_file

    for i, p in enumerate(paths):
        for q in paths[:i]:
            if same_file(p, q):
                raise InputError(f"{what}: {p} is given twice (as {q}); give each file once, or "
                                 "its values would count twice.")


def _check_years(years: pd.Series, rows: pd.Series, path: object, col: str,
                 bounds: tuple[int, int]) -> None:
    bad = ~(years.between(*bounds)) & years.notna()
    if bad.any():
        r = rows[bad].iloc[0]
        raise InputError(f"{path}, row {r}: column {col!r} holds {years[bad].iloc[0]:g}, outside "
                         f"the plausible years {bounds[0]}..{bounds[1]}; fix the value.")


def _check_magnitude(values: pd.Series, rows: pd.Series, path: object, col: str) -> None:
    with np.errstate(invalid="ignore"):
        bad = values.notna() & ~(values.abs() <= MAX_ABS_VALUE)
    if bad.any():
        r = rows[bad].iloc[0]
        raise InputError(f"{path}, row {r}: column {col!r} holds {values[bad].iloc[0]!r}, which "
                         f"is not a finite value of plausible size (|x| <= {MAX_ABS_VALUE:g}); "
                         "fix or blank it.")


def _decode(path: Path, data: bytes) -> str:
    if b"\x00" in data[:65536]:
        raise InputError(f"{path} is not a text table (it holds binary data); give a CSV "
                         "file, or a Parquet file ending in .parquet.")
    try:
        return data.decode("utf-8-sig")
    except UnicodeDecodeError:
        return data.decode("latin-1")


def _sniff_delimiter(path: Path, text: str) -> str:
    lines = [ln for ln in text.splitlines() if ln.strip()][:50]
    header = lines[0] if lines else ""
    try:
        return csv.Sniffer().sniff("\n".join(lines), delimiters=_DELIMITERS).delimiter
    except csv.Error:
        found = [d for d in _DELIMITERS if d in header]
        if len(found) == 1:
            return found[0]
        if not found:
            return ","
        raise InputError(f"{path}: cannot tell the delimiter of the header row (it holds "
                         f"{' and '.join(repr(d) for d in found)}); save the file with commas "
                         "between columns.") from None


def read_text_table(path: Path) -> pd.DataFrame:
    """Read a delimited text table as strings.

    Parameters
    ----------
    path
        CSV (or semicolon, tab or bar delimited) file.

    Returns
    -------
    pandas.DataFrame
        All values as stripped strings, blanks as ``""``; headers stripped.
    """
    _check_file(path)
    text = _decode(path, _read_bytes(path))
    if not text.strip():
        raise InputError(f"{path} is empty; give a file with a header row and data rows.")
    sep = _sniff_delimiter(path, text)
    try:
        df = pd.read_csv(io.StringIO(text), sep=sep, dtype=str, keep_default_na=False,
                         skip_blank_lines=True, skipinitialspace=True)
    except (pd.errors.ParserError, ValueError) as exc:
        raise InputError(f"{path} cannot be parsed as a table ({str(exc).strip()}); check "
                         "that every row has as many fields as the header.") from None
    df.columns = [str(c).strip() for c in df.columns]
    first = next(ln for ln in text.splitlines() if ln.strip())
    header = next(csv.reader(io.StringIO(first), delimiter=sep))
    names = [h.strip() for h in header]
    dup = next((h for i, h in enumerate(names) if h and h in names[:i]), None)
    if dup is not None:
        raise InputError(f"{path}: the header {dup!r} appears more than once; rename or remove "
                         "the extra column.")
    if df.empty:
        raise InputError(f"{path} has a header but no data rows.")
    return df.apply(lambda s: s.str.strip())


def _read_parquet(path: Path) -> pd.DataFrame:
    try:
        df = pd.read_parquet(path)
    except Exception as exc:  # pyarrow raises many error types for damaged files
        raise InputError(f"{path} cannot be read as Parquet ({type(exc).__name__}); check "
                         "that the file is complete.") from None
    if df.empty:
        raise InputError(f"{path} has columns but no data rows.")
    out = pd.DataFrame(index=df.index)
    for col in df.columns:
        s = df[col]
        text = s.astype(str).where(s.notna(), "")
        out[str(col).strip()] = text.str.strip()
    return out.reset_index(drop=True)


def map_columns(df: pd.DataFrame, mapping: Mapping[str, str], table: Table, path: Path,
                option: str) -> pd.DataFrame:
    """Rename the user's headers to ours and check the required columns.

    Parameters
    ----------
    df
        The table as read.
    mapping
        ``{ours: theirs}`` from ``--columns``-style options or a config table.
    table
        The schema table the file must follow.
    path
        The file, for messages.
    option
        The option that maps this table's headers, for messages.

    Returns
    -------
    pandas.DataFrame
        Only the schema's columns that are present, named as ours.
    """
    known = set(table.names)
    for ours, theirs in mapping.items():
        if ours not in known:
            raise InputError(f"{option} maps {ours!r}, which is not a column of the "
                             f"{table.name} table; known columns: {', '.join(table.names)}.")
        if theirs not in df.columns:
            raise InputError(f"{path} has no column {theirs!r} (mapped to {ours!r} by "
                             f"{option}); columns present: {', '.join(map(str, df.columns))}.")
    rename = {theirs: ours for ours, theirs in mapping.items()}
    lower = {str(c).lower(): c for c in df.columns}
    for name in table.names:
        if name not in mapping and name not in df.columns and name in lower:
            rename[lower[name]] = name  # case-insensitive match of our own names
    df = df.rename(columns=rename)
    missing = [c for c in table.required if c not in df.columns]
    if missing:
        raise InputError(f"{path} has no column {missing[0]!r}; map yours with {option} "
                         f"{missing[0]}=YOUR_HEADER (columns present: "
                         f"{', '.join(map(str, df.columns))}).")
    return df[[c for c in table.names if c in df.columns]].copy()


def read_table(path: Path, table: Table, mapping: Mapping[str, str] | None = None,
               option: str = "--columns") -> pd.DataFrame:
    """Read a CSV or Parquet table, map headers and check required columns.

    Parameters
    ----------
    path
        The file (``.parquet``/``.pq`` read as Parquet, anything else as text).
    table
        Schema table to validate against.
    mapping
        Header mapping ``{ours: theirs}``.
    option
        Option name to suggest in messages.

    Returns
    -------
    pandas.DataFrame
        String values, our column names, and ``row`` (1 = first data row).
    """
    _check_file(path)
    if path.suffix.lower() in (".parquet", ".pq"):
        df = _read_parquet(path)
    else:
        df = read_text_table(path)
    df = map_columns(df, mapping or {}, table, path, option)
    df.insert(0, "row", np.arange(1, len(df) + 1))
    return df.reset_index(drop=True)


def read_casts(path: Path, mapping: Mapping[str, str] | None = None) -> pd.DataFrame:
    """Read a casts file (see :data:`coldindex.schema.CASTS`)."""
    return read_table(path, CASTS, mapping, "--columns")


def _numbers(df: pd.DataFrame, col: str) -> pd.Series:
    return pd.to_numeric(df[col].astype(str).str.strip().replace("", np.nan), errors="coerce")


def read_ice(path: Path, mapping: Mapping[str, str] | None = None) -> pd.DataFrame:
    """Read a monthly ice file (see :data:`coldindex.schema.ICE`).

    Years must lie in :data:`OBSERVED_YEARS` and values be of plausible size
    (finite, ``|x| <=`` :data:`MAX_ABS_VALUE`); the row is named otherwise.
    """
    df = read_table(path, ICE, mapping, "--ice-columns")
    _check_years(_numbers(df, "year"), df["row"], path, "year", OBSERVED_YEARS)
    _check_magnitude(_numbers(df, "ice"), df["row"], path, "ice")
    return df


def read_trajectories(path: Path, mapping: Mapping[str, str] | None = None) -> pd.DataFrame:
    """Read a trajectories file (see :data:`coldindex.schema.TRAJECTORIES`).

    Years must lie in :data:`TRAJECTORY_YEARS`, values be of plausible size, and
    model and scenario names be non-blank and differ from the summary rows the
    projection adds (:data:`SUMMARY_ROW_NAMES`).
    """
    df = read_table(path, TRAJECTORIES, mapping, "--trajectory-columns")
    _check_years(_numbers(df, "year"), df["row"], path, "year", TRAJECTORY_YEARS)
    _check_magnitude(_numbers(df, "value"), df["row"], path, "value")
    _check_names(df, path)
    return df


def _check_names(df: pd.DataFrame, path: object) -> None:
    for col in ("model", "scenario"):
        if col not in df.columns:
            continue
        names = df[col].astype(str).str.strip()
        blank = names.eq("") | names.str.lower().isin(["nan", "none", "null"])
        if blank.any():
            r = df["row"][blank].iloc[0] if "row" in df else "?"
            raise InputError(f"{path}, row {r}: column {col!r} is blank; name every {col}.")
        clash = names.str.lower().isin(SUMMARY_ROW_NAMES)
        if clash.any():
            r = df["row"][clash].iloc[0] if "row" in df else "?"
            raise InputError(f"{path}, row {r}: the {col} name {names[clash].iloc[0]!r} is "
                             "reserved for the summary rows coldindex adds; rename it.")


def check_trajectories(traj: pd.DataFrame, source: str) -> None:
    """Refuse trajectories no projection can use: blank or reserved names, a model all missing.

    Parameters
    ----------
    traj
        ``model``, ``scenario``, ``year``, ``value`` (from CSV files or the gridded path).
    source
        The files, for messages.
    """
    _check_names(traj.assign(row="?") if "row" not in traj else traj, source)
    _check_years(pd.to_numeric(traj["year"], errors="coerce"), pd.Series(["?"] * len(traj),
                 index=traj.index), source, "year", TRAJECTORY_YEARS)
    values = pd.to_numeric(traj["value"], errors="coerce")
    for (model, scenario), g in values.groupby([traj["model"], traj["scenario"]]):
        if not np.isfinite(g.to_numpy(float)).any():
            raise InputError(f"{source}: model {model!r} under scenario {scenario!r} holds no "
                             "finite value (all missing); remove it or fix its data.")


def read_domain(path: Path) -> Domain:
    """Read a domain polygon from GeoJSON (one Polygon or MultiPolygon, lon/lat)."""
    obj = read_json(path, "give one Polygon or MultiPolygon", "GeoJSON")
    if not isinstance(obj, dict):
        raise InputError(f"{path} is not a GeoJSON object.")
    try:
        return domain_from_geojson(obj)
    except InputError as exc:
        raise InputError(f"{path}: {exc}") from None
    except (ValueError, TypeError, KeyError, IndexError, AttributeError) as exc:
        raise InputError(f"{path} is not a usable survey domain ({type(exc).__name__}); give one "
                         "Polygon or MultiPolygon of the survey area in lon/lat, smaller than "
                         "a hemisphere.") from None


def read_regions(path: Path, domain: Domain) -> list:
    """Read named regions from GeoJSON into the domain's plane (:mod:`coldindex.regions`)."""
    from coldindex.regions import regions_from_geojson

    obj = read_json(path, "give a FeatureCollection of named polygons (--regions)", "GeoJSON")
    return regions_from_geojson(obj, domain, source=str(path))


def read_coastline(path: Path, domain: Domain) -> list:
    """Read a coastline (GeoJSON lines or polygons) into the domain's plane, for maps."""
    from coldindex.regions import lines_from_geojson

    obj = read_json(path, "give the coastline as lines or polygons (inputs.coastline)",
                    "GeoJSON")
    return lines_from_geojson(obj, domain, source=str(path))


def read_bathymetry(path: Path) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Read a bathymetry grid on 1-D lon/lat axes.

    Returns
    -------
    tuple
        ``(lon_axis, lat_axis, depth)`` with depth positive down, shape (lat, lon). [m]
    """
    _check_file(path)
    try:
        ds = xr.open_dataset(path)
    except Exception as exc:  # netCDF backends raise many error types
        raise InputError(f"{path} cannot be read as NetCDF ({type(exc).__name__}); check "
                         "that the file is complete.") from None
    with ds:
        names = [v for v in ds.data_vars if ds[v].ndim == 2]
        pick = [v for v in names if v in ("depth", "depth_m", "elevation", "z", "bathymetry")]
        if not pick:
            present = ", ".join(map(str, ds.data_vars))
            raise InputError(f"{path} has no 2-D depth variable (looked for depth, elevation, "
                             f"z, bathymetry; variables present: {present}).")
        da = ds[pick[0]]
        lon_name = next((d for d in da.dims if str(d).lower().startswith("lon")), None)
        lat_name = next((d for d in da.dims if str(d).lower().startswith("lat")), None)
        if lon_name is None or lat_name is None:
            raise InputError(f"{path}: variable {pick[0]!r} needs lon and lat dimensions, "
                             f"has {', '.join(map(str, da.dims))}.")
        da = da.transpose(lat_name, lon_name)
        try:
            values = np.asarray(da.values, dtype=float)
            lon_axis = np.asarray(ds[lon_name].values, float)
            lat_axis = np.asarray(ds[lat_name].values, float)
        except Exception as exc:  # a truncated file fails only when read
            raise InputError(f"{path} cannot be read ({type(exc).__name__}); check that the "
                             "file is complete.") from None
        for name, axis in (("lon", lon_axis), ("lat", lat_axis)):
            steps = np.diff(axis)
            if (len(axis) < 2 or not np.all(np.isfinite(axis))
                    or not (np.all(steps > 0) or np.all(steps < 0))):
                raise InputError(f"{path}: the {name} axis is not strictly monotonic; the file "
                                 "is damaged or not on a regular lon/lat grid.")
        if not np.isfinite(values).any():
            raise InputError(f"{path} holds no finite depth; check the file.")
        if pick[0] in ("elevation", "z") or str(da.attrs.get("positive", "down")) == "up":
            values = -values
        return lon_axis, lat_axis, values


def check_netcdf(path: Path, option: str) -> None:
    """Refuse a file that does not open as NetCDF, before any work."""
    _check_file(path)
    try:
        ds = xr.open_dataset(path)
    except Exception as exc:  # netCDF backends raise many error types
        raise InputError(f"{path} ({option}) cannot be read as NetCDF ({type(exc).__name__}); "
                         "give a complete NetCDF file.") from None
    ds.close()


def read_series(path: Path, value: str, mapping: Mapping[str, str] | None = None,
                option: str = "--columns") -> pd.DataFrame:
    """Read a yearly series: ``year`` and the value column (and its ``_sd`` when present).

    Parameters
    ----------
    path
        CSV or Parquet file with one row a year (e.g. ``indices.csv``).
    value
        The value column (after mapping).
    mapping
        Header mapping ``{ours: theirs}``; ``year`` and ``value`` names may be mapped.
    option
        Option name used in messages.

    Returns
    -------
    pandas.DataFrame
        ``year`` (int), ``value`` (float, NaN for blanks) and ``sd`` when the file
        has ``<value>_sd``; sorted by year.
    """
    _check_file(path)
    df = _read_parquet(path) if path.suffix.lower() in (".parquet", ".pq") else \
        read_text_table(path)
    rename = {theirs: ours for ours, theirs in (mapping or {}).items()}
    for theirs in rename:
        if theirs not in df.columns:
            raise InputError(f"{path} has no column {theirs!r} (mapped by {option}); columns "
                             f"present: {', '.join(map(str, df.columns))}.")
    df = df.rename(columns=rename)
    for col in ("year", value):
        if col not in df.columns:
            raise InputError(f"{path} has no column {col!r}; pick one with --value or map it "
                             f"with {option} {col}=YOUR_HEADER (columns present: "
                             f"{', '.join(map(str, df.columns))}).")
    years = pd.to_numeric(df["year"], errors="coerce")
    with np.errstate(invalid="ignore"):
        bad_year = years.isna() | ~np.isfinite(years) | (years != years.round())
    if bad_year.any():
        bad = int(np.flatnonzero(bad_year)[0]) + 1
        raise InputError(f"{path}, data row {bad}: column 'year' needs a whole year, got: "
                         f"{df['year'].iloc[bad - 1]!r}.")
    _check_years(years, pd.Series(np.arange(1, len(df) + 1), index=df.index), path, "year",
                 OBSERVED_YEARS)
    text = df[value].astype(str).str.strip()
    blank = text.eq("") | text.str.lower().isin(["na", "nan", "null", "none", "-"])
    vals = pd.to_numeric(text.where(~blank), errors="coerce")
    with np.errstate(invalid="ignore"):
        bad_mask = ~blank & (vals.isna() | ~(vals.abs() <= MAX_ABS_VALUE))
    if bad_mask.any():
        bad = int(np.flatnonzero(bad_mask)[0]) + 1
        raise InputError(f"{path}, data row {bad}: column {value!r} needs a finite number of "
                         f"plausible size (|x| <= {MAX_ABS_VALUE:g}) or a blank, got: "
                         f"{df[value].iloc[bad - 1]!r}.")
    if not vals.notna().any():
        raise InputError(f"{path}: column {value!r} holds no value (every row is blank); "
                         "give a series with values.")
    out = pd.DataFrame({"year": years.astype(int), "value": vals.astype(float)})
    dup = out["year"][out["year"].duplicated()]
    if len(dup):
        raise InputError(f"{path}: year {int(dup.iloc[0])} appears more than once; keep one row "
                         "a year.")
    if f"{value}_sd" in df.columns:
        sd = pd.to_numeric(df[f"{value}_sd"].replace("", np.nan), errors="coerce")
        out["sd"] = sd.where(np.isfinite(sd) & (sd >= 0))  # a damaged SD is no SD
    return out.sort_values("year").reset_index(drop=True)


def read_cuts(path: Path) -> dict:
    """Read a ``cuts.json`` file as a dictionary."""
    obj = read_json(path, "write it with coldindex classify")
    if not isinstance(obj, dict):
        raise InputError(f"{path} is not a cuts object; write it with coldindex classify.")
    for key in ("low", "high"):
        v = obj.get(key)
        if key in obj and (isinstance(v, bool) or not isinstance(v, (int, float))
                           or not np.isfinite(v) or abs(v) > MAX_ABS_VALUE):
            raise InputError(f"{path}: {key!r} needs a finite number, got: {v!r}; write the file "
                             "with coldindex classify.")
    if isinstance(obj.get("low"), (int, float)) and isinstance(obj.get("high"), (int, float)) \
            and obj["low"] > obj["high"]:
        raise InputError(f"{path}: 'low' ({obj['low']}) is above 'high' ({obj['high']}); write "
                         "the file with coldindex classify.")
    if "column" in obj and not isinstance(obj["column"], str):
        raise InputError(f"{path}: 'column' needs a column name, got: {obj['column']!r}.")
    if "direction" in obj and obj["direction"] not in ("lower", "higher"):
        raise InputError(f"{path}: 'direction' needs to be lower or higher, got: "
                         f"{obj['direction']!r}.")
    return obj
