"""Reader of gridded sea-ice fields (CF NetCDF) and of ice regions (GeoJSON).

Concentration is the variable with ``standard_name = "sea_ice_area_fraction"``
(``units`` ``%``/``percent`` or ``1``/fraction); thickness, optional, the one with
``sea_ice_thickness`` (``m`` or ``cm``), read as floe thickness or as a mean over
the cell from its ``cell_methods`` (``area: mean where sea_ice`` or ``area: mean
where sea``). The grid is a lon/lat grid on 1-D axes, a projected grid on 1-D x/y
axes with a CF grid mapping, or a curvilinear grid with 2-D latitude and longitude
(with CF ``bounds`` or not). Fields are opened lazily and read in chunks of
:data:`TIME_CHUNK` time steps.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pyproj
import xarray as xr

from coldindex.domain import Domain, domain_from_geojson
from coldindex.errors import InputError
from coldindex.icefields import (
    GridCells,
    corners_from_centres_2d,
    lonlat_grid_cells,
    projected_grid_cells,
)
from coldindex.io.readers import _check_file, read_json

TIME_CHUNK = 31  # time steps read at once: a month of daily fields
CONCENTRATION_UNITS = {"%": 0.01, "percent": 0.01, "1": 1.0, "": None, "fraction": 1.0,
                       "0-1": 1.0}
THICKNESS_UNITS = {"m": 1.0, "meter": 1.0, "meters": 1.0, "metre": 1.0, "metres": 1.0,
                   "cm": 0.01}


@dataclass
class IceFieldFile:
    """One opened file of ice fields (lazy).

    Attributes
    ----------
    concentration
        Fraction 0..1, dims (time, y, x), dask-backed.
    thickness
        Thickness in metres on the same dims, or None.
    floe_thickness
        Whether the thickness is floe thickness (multiply by concentration).
    cells
        The grid's cells.
    years, months
        Calendar year and month of each time step.
    grid_key
        A fingerprint of the grid, to refuse files on different grids.
    """

    concentration: xr.DataArray
    thickness: xr.DataArray | None
    floe_thickness: bool
    cells: GridCells
    years: np.ndarray
    months: np.ndarray
    grid_key: tuple
    dataset: xr.Dataset

    def close(self) -> None:
        """Close the file."""
        self.dataset.close()


def _find(ds: xr.Dataset, standard_name: str) -> str | None:
    for name, var in ds.variables.items():
        if str(var.attrs.get("standard_name", "")).strip() == standard_name:
            return str(name)
    return None


def _coord(ds: xr.Dataset, standard_name: str, units: tuple[str, ...]) -> str | None:
    name = _find(ds, standard_name)
    if name is not None:
        return name
    for n, var in ds.variables.items():
        if str(var.attrs.get("units", "")).strip().lower() in units:
            return str(n)
    return None


def thickness_kind(cell_methods: str, mode: str, path: Path, var: str) -> bool:
    """Whether a ``sea_ice_thickness`` is floe thickness (True) or a cell mean (False).

    Parameters
    ----------
    cell_methods
        The variable's ``cell_methods`` attribute ('' when absent).
    mode
        ``auto`` (read ``cell_methods``), ``floe`` or ``cell``.
    path, var
        For messages.
    """
    if mode == "floe":
        return True
    if mode == "cell":
        return False
    text = cell_methods.lower()
    if re.search(r"where\s+sea_ice\b", text):
        return True
    if re.search(r"where\s+sea\b", text):
        return False
    raise InputError(f"{path}: variable {var!r} (sea_ice_thickness) has cell_methods "
                     f"{cell_methods!r}, which says neither 'area: mean where sea_ice' (floe "
                     "thickness) nor 'area: mean where sea' (volume per cell area); set "
                     "ice_fields.thickness (or --thickness) to floe or cell.")


def _open(path: Path) -> xr.Dataset:
    _check_file(path)
    try:
        return xr.open_dataset(path, decode_times=True, mask_and_scale=True)
    except Exception as exc:  # netCDF backends raise many error types
        raise InputError(f"{path} cannot be read as NetCDF ({type(exc).__name__}); give a "
                         "complete NetCDF file.") from None


def open_ice_fields(path: Path, thickness_mode: str = "auto") -> IceFieldFile:
    """Open one file of gridded ice fields lazily.

    Parameters
    ----------
    path
        CF NetCDF with ``sea_ice_area_fraction`` (and optionally ``sea_ice_thickness``).
    thickness_mode
        ``auto``, ``floe`` or ``cell`` (see :func:`thickness_kind`).

    Returns
    -------
    IceFieldFile
        The lazily opened fields and their grid.
    """
    ds = _open(path)
    try:
        return _interpret(ds, path, thickness_mode)
    except BaseException:
        ds.close()
        raise


def _interpret(ds: xr.Dataset, path: Path, thickness_mode: str) -> IceFieldFile:
    c_name = _find(ds, "sea_ice_area_fraction")
    if c_name is None:
        raise InputError(f"{path} has no variable with standard_name 'sea_ice_area_fraction' "
                         "(ice concentration); add the attribute to the concentration "
                         "variable.")
    conc = ds[c_name]
    if conc.ndim not in (2, 3):
        raise InputError(f"{path}: {c_name!r} has dimensions {conc.dims}; expected (time, y, x) "
                         "or (y, x).")
    units = str(conc.attrs.get("units", "")).strip().lower()
    scale = CONCENTRATION_UNITS.get(units, None)
    if scale is None:
        raise InputError(f"{path}: {c_name!r} has units {conc.attrs.get('units', '(none)')!r}; "
                         "set units to '%' (percent) or '1' (fraction) so the concentration "
                         "is read right.")
    ydim, xdim = str(conc.dims[-2]), str(conc.dims[-1])
    if conc.ndim == 2:
        t_name = _coord(ds, "time", ())
        if t_name is None or ds[t_name].size != 1:
            raise InputError(f"{path}: {c_name!r} has no time dimension and the file no single "
                             "time coordinate; add the time of the field.")
        conc = conc.expand_dims(time=np.atleast_1d(ds[t_name].values))
        tdim = "time"
    else:
        tdim = str(conc.dims[0])
    conc = conc.transpose(tdim, ydim, xdim)
    years, months = _year_month(conc[tdim], path)
    if scale == 1.0:  # a percent field labelled as a fraction would count as no ice at all
        with np.errstate(invalid="ignore"):
            first = np.asarray(conc.isel({tdim: 0}).values, dtype=float)
            top = float(np.nanmax(first)) if np.isfinite(first).any() else 0.0
        if 1.5 < top <= 100.5:
            raise InputError(f"{path}: {c_name!r} has units {units!r} (a fraction) but values "
                             f"up to {top:g}, like percent; set its units to '%' so the "
                             "concentration is read right.")
    conc = (conc.chunk({tdim: TIME_CHUNK, ydim: -1, xdim: -1}) * scale).rename(
        {tdim: "time"})

    h_name = _find(ds, "sea_ice_thickness")
    thick = None
    floe = True
    if h_name is not None:
        h = ds[h_name]
        hu = str(h.attrs.get("units", "")).strip().lower()
        if hu not in THICKNESS_UNITS:
            raise InputError(f"{path}: {h_name!r} has units {h.attrs.get('units', '(none)')!r}; "
                             "set units to 'm' or 'cm'.")
        if h.dims[-2:] != (ydim, xdim) or (h.ndim == 3) != (ds[c_name].ndim == 3):
            raise InputError(f"{path}: {h_name!r} has dimensions {h.dims}, not those of the "
                             f"concentration {ds[c_name].dims}.")
        floe = thickness_kind(str(h.attrs.get("cell_methods", "")), thickness_mode, path,
                              h_name)
        if h.ndim == 2:
            h = h.expand_dims(time=conc["time"].values)
        else:
            h = h.transpose(tdim, ydim, xdim).rename({tdim: "time"})
        thick = h.chunk({"time": TIME_CHUNK, ydim: -1, xdim: -1}) * THICKNESS_UNITS[hu]

    cells, key = _grid(ds, conc, ydim, xdim, path)
    return IceFieldFile(concentration=conc, thickness=thick, floe_thickness=floe, cells=cells,
                        years=years, months=months, grid_key=key, dataset=ds)


def _year_month(time: xr.DataArray, path: Path) -> tuple[np.ndarray, np.ndarray]:
    try:
        years = np.asarray(time.dt.year.values, dtype=int)
        months = np.asarray(time.dt.month.values, dtype=int)
    except (TypeError, AttributeError):
        raise InputError(f"{path}: the time coordinate {time.name!r} is not decoded as dates; "
                         "give it CF units such as 'days since 1970-01-01'.") from None
    return years, months


def _bounds(ds: xr.Dataset, name: str) -> np.ndarray | None:
    b = ds[name].attrs.get("bounds")
    if b and b in ds.variables:
        return np.asarray(ds[b].values, dtype=float)
    return None


def _edges_from_bounds(b: np.ndarray | None) -> np.ndarray | None:
    if b is None or b.ndim != 2 or b.shape[1] != 2:
        return None
    return np.concatenate([b[:, 0], b[-1:, 1]])


def _grid(ds: xr.Dataset, conc: xr.DataArray, ydim: str, xdim: str, path: Path
          ) -> tuple[GridCells, tuple]:
    lat_name = _coord(ds, "latitude", ("degrees_north", "degree_north", "degrees_n"))
    lon_name = _coord(ds, "longitude", ("degrees_east", "degree_east", "degrees_e"))
    gm_name = str(ds[_find(ds, "sea_ice_area_fraction") or ""].attrs.get("grid_mapping", ""))
    gm = ds[gm_name] if gm_name and gm_name in ds.variables else None
    projected = gm is not None and gm.attrs.get("grid_mapping_name") != "latitude_longitude"
    if projected:
        assert gm is not None
        x_name = _find(ds, "projection_x_coordinate") or xdim
        y_name = _find(ds, "projection_y_coordinate") or ydim
        if x_name not in ds.variables or y_name not in ds.variables:
            raise InputError(f"{path}: the grid mapping {gm_name!r} needs x and y coordinates "
                             "(standard_name projection_x_coordinate / projection_y_coordinate).")
        try:
            crs = pyproj.CRS.from_cf(dict(gm.attrs))
        except pyproj.exceptions.CRSError as exc:
            raise InputError(f"{path}: the grid mapping {gm_name!r} cannot be read as a "
                             f"projection ({exc}); check its attributes.") from None
        factor = {"m": 1.0, "meter": 1.0, "meters": 1.0, "km": 1000.0}.get(
            str(ds[x_name].attrs.get("units", "m")).strip().lower())
        if factor is None:
            raise InputError(f"{path}: the x coordinate {x_name!r} has units "
                             f"{ds[x_name].attrs.get('units')!r}; give metres or km.")
        x = np.asarray(ds[x_name].values, float) * factor
        y = np.asarray(ds[y_name].values, float) * factor
        _check_axis(x, x_name, path)
        _check_axis(y, y_name, path)
        cells = projected_grid_cells(x, y, crs)
        return cells, ("projected", crs.to_wkt(), x.tobytes(), y.tobytes())
    if lat_name is None or lon_name is None:
        raise InputError(f"{path}: no latitude/longitude coordinates (standard_name latitude "
                         "and longitude) and no grid mapping; the cells cannot be located.")
    lat, lon = ds[lat_name], ds[lon_name]
    if lat.ndim == 1 and lon.ndim == 1:
        if lat.dims != (ydim,) or lon.dims != (xdim,):
            raise InputError(f"{path}: latitude runs along {lat.dims} and longitude along "
                             f"{lon.dims}; expected ({ydim!r},) and ({xdim!r},).")
        la, lo = np.asarray(lat.values, float), np.asarray(lon.values, float)
        _check_axis(la, lat_name, path)
        cells = lonlat_grid_cells(lo, la, _edges_from_bounds(_bounds(ds, lon_name)),
                                  _edges_from_bounds(_bounds(ds, lat_name)))
        return cells, ("lonlat", la.tobytes(), lo.tobytes())
    if lat.ndim == 2 and lon.ndim == 2:
        la2 = np.asarray(lat.transpose(ydim, xdim).values, float)
        lo2 = np.asarray(lon.transpose(ydim, xdim).values, float)
        blat, blon = _bounds(ds, lat_name), _bounds(ds, lon_name)
        if (blat is not None and blon is not None and blat.ndim == 3
                and blat.shape[-1] == 4 and blon.shape == blat.shape):
            cells = GridCells(vert_lon=blon, vert_lat=blat)
        else:
            vlo, vla = corners_from_centres_2d(lo2, la2)
            cells = GridCells(vert_lon=vlo, vert_lat=vla)
        return cells, ("curvilinear", la2.tobytes(), lo2.tobytes())
    raise InputError(f"{path}: latitude and longitude have {lat.ndim} and {lon.ndim} "
                     "dimensions; expected both 1-D or both 2-D.")


def _check_axis(a: np.ndarray, name: str, path: Path) -> None:
    steps = np.diff(a)
    if len(a) < 2 or not np.all(np.isfinite(a)) or not (np.all(steps > 0)
                                                         or np.all(steps < 0)):
        raise InputError(f"{path}: the axis {name!r} is not strictly monotonic (or has one "
                         "value); the file is damaged or not on a regular grid.")


def read_regions(path: Path) -> dict[str, Domain]:
    """Read ice regions from GeoJSON.

    A FeatureCollection (names from ``properties.name``), one Feature, or one geometry.

    Returns
    -------
    dict
        ``{name: Domain}`` in file order.
    """
    obj = read_json(path, "give a FeatureCollection of region polygons", "GeoJSON")
    if not isinstance(obj, dict):
        raise InputError(f"{path} is not a GeoJSON object.")
    feats = obj.get("features") if obj.get("type") == "FeatureCollection" else [obj]
    if not isinstance(feats, list) or not feats:
        raise InputError(f"{path} holds no region; give at least one polygon feature.")
    out: dict[str, Domain] = {}
    for k, f in enumerate(feats):
        props = f.get("properties") if isinstance(f, dict) else None
        name = str((props or {}).get("name") or ("region" if len(feats) == 1 else
                                                  f"region-{k + 1}"))
        if name in out:
            raise InputError(f"{path}: the region name {name!r} appears twice; name each "
                             "region once.")
        try:
            out[name] = domain_from_geojson(f)
        except InputError as exc:
            raise InputError(f"{path}, region {name!r}: {exc}") from None
        except (ValueError, TypeError, KeyError, IndexError, AttributeError) as exc:
            raise InputError(f"{path}, region {name!r} is not a usable polygon "
                             f"({type(exc).__name__}).") from None
    return out


def read_ice_series(path: Path, mapping: dict[str, str] | None = None,
                    quantity: str = "mass_gt", region: str = "") -> Any:
    """Read a monthly ice file for the skill stage: ``year, month, ice`` or the tidy table.

    A tidy ``ice_fields.csv`` (columns ``quantity`` and ``region``, as ``coldindex ice``
    writes it) gives the series of ``quantity`` in ``region`` (empty: the only region);
    any other file is read as the monthly ice table
    (:func:`coldindex.io.readers.read_ice`).

    Returns
    -------
    pandas.DataFrame
        Strings ``row``, ``year``, ``month``, ``ice``, as :func:`coldindex.io.readers.read_ice`.
    """
    import pandas as pd

    from coldindex.icefields import series_for_skill
    from coldindex.io.readers import read_ice, read_text_table
    from coldindex.schema import numeric_column

    if path.suffix.lower() not in (".parquet", ".pq"):
        head = read_text_table(path)
        if {"quantity", "region", "value", "year", "month"} <= set(head.columns):
            head.insert(0, "row", np.arange(1, len(head) + 1))
            num = head.assign(year=numeric_column(head, "year", str(path), whole=True),
                              month=numeric_column(head, "month", str(path), whole=True),
                              value=numeric_column(head, "value", str(path), allow_blank=True))
            s = series_for_skill(num, quantity, region)
            return pd.DataFrame({"row": np.arange(1, len(s) + 1),
                                 "year": s["year"].astype(str), "month": s["month"].astype(str),
                                 "ice": [("" if not np.isfinite(v) else repr(float(v)))
                                         for v in s["ice"]]})
    return read_ice(path, mapping)
