"""Gridded model bottom temperature -> the same indices on the survey grid, lazily.

Each model file (or each entry of a ``model`` dimension) is opened with xarray
and dask in time chunks; the chosen season is averaged per year; the annual
fields are interpolated bilinearly onto the survey grid's cells (a sparse
weight matrix built once: bilinear on 1-D lat/lon axes, barycentric on a
Delaunay triangulation for 2-D lat/lon); temperatures are adjusted per cell
against the observed ``fields.nc`` over the calibration years (``none``,
``delta`` or ``qmap``); and the index (mean or area below a threshold of the
adjusted map) is computed with the index module's functions. Memory stays
bounded by the chunk size, whatever the file size. With ``scheduler`` the work
runs on an existing ``dask.distributed`` cluster.
"""

from __future__ import annotations

from collections.abc import Sequence
from contextlib import nullcontext
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import scipy.sparse as sp
import xarray as xr
from numpy.typing import NDArray
from scipy.spatial import Delaunay

from coldindex.domain import central_lon, unwrap_lon
from coldindex.errors import InputError
from coldindex.indices import area_below, area_weighted_mean
from coldindex.project import quantile_map
from coldindex.schema import threshold_from_column

FloatArray = NDArray[np.float64]
LAT_NAMES = ("lat", "latitude", "nav_lat", "y_lat")
LON_NAMES = ("lon", "longitude", "nav_lon", "x_lon")


def _find(ds: xr.Dataset, names: Sequence[str], path: Path, what: str) -> str:
    for n in list(ds.coords) + list(ds.data_vars):
        if str(n).lower() in names:
            return str(n)
    raise InputError(f"{path} has no recognisable {what} (looked for {', '.join(names)}).")


def bilinear_weights(lon_axis: FloatArray, lat_axis: FloatArray, lon: FloatArray,
                     lat: FloatArray) -> sp.csr_matrix:
    """Sparse (m, nlat * nlon) bilinear weights from a regular lon/lat grid to points.

    Longitudes of axis and points must already be unwrapped to one branch;
    points outside the grid get no weight (NaN after normalisation).
    """
    lo_order = np.argsort(lon_axis)
    la_order = np.argsort(lat_axis)
    lo, la = lon_axis[lo_order], lat_axis[la_order]
    i = np.clip(np.searchsorted(lo, lon) - 1, 0, len(lo) - 2)
    j = np.clip(np.searchsorted(la, lat) - 1, 0, len(la) - 2)
    fx = (lon - lo[i]) / (lo[i + 1] - lo[i])
    fy = (lat - la[j]) / (la[j + 1] - la[j])
    inside = (fx >= -1e-9) & (fx <= 1 + 1e-9) & (fy >= -1e-9) & (fy <= 1 + 1e-9)
    rows, cols, vals = [], [], []
    nlon = len(lo)
    for dj, di, w in ((0, 0, (1 - fx) * (1 - fy)), (0, 1, fx * (1 - fy)),
                      (1, 0, (1 - fx) * fy), (1, 1, fx * fy)):
        rows.append(np.flatnonzero(inside))
        cols.append((la_order[j + dj] * nlon + lo_order[i + di])[inside])
        vals.append(w[inside])
    return sp.csr_matrix((np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))),
                         shape=(len(lon), len(la) * nlon))


def barycentric_weights(lon2d: FloatArray, lat2d: FloatArray, lon: FloatArray,
                        lat: FloatArray) -> sp.csr_matrix:
    """Sparse linear (barycentric) weights on a Delaunay triangulation of a 2-D grid."""
    pts = np.column_stack([lon2d.ravel(), lat2d.ravel()])
    tri = Delaunay(pts)
    target = np.column_stack([lon, lat])
    simplex = tri.find_simplex(target)
    inside = simplex >= 0
    T = tri.transform[simplex[inside]]
    b = np.einsum("ijk,ik->ij", T[:, :2], target[inside] - T[:, 2])
    bary = np.column_stack([b, 1 - b.sum(axis=1)])
    verts = tri.simplices[simplex[inside]]
    rows = np.repeat(np.flatnonzero(inside), 3)
    return sp.csr_matrix((bary.ravel(), (rows, verts.ravel())), shape=(len(lon), len(pts)))


def _to_celsius(da: xr.DataArray, path: Path) -> xr.DataArray:
    units = str(da.attrs.get("units", "")).strip().lower()
    if units in ("k", "kelvin", "degk", "deg_k"):
        return da - 273.15
    if units in ("degc", "deg_c", "celsius", "°c", "c", "degrees_celsius"):
        return da
    raise InputError(f"{path}: variable {da.name!r} has units {units or 'none'!r}; expected "
                     "degC or K (CF units).")


def _season_means(da: xr.DataArray, months: list[int], path: Path) -> xr.DataArray:
    tname = next((d for d in da.dims if str(d).lower() in ("time", "t")), None)
    if tname is None:
        raise InputError(f"{path}: variable {da.name!r} has no time dimension (dims: "
                         f"{', '.join(map(str, da.dims))}).")
    try:
        month = da[tname].dt.month
        year = da[tname].dt.year
    except (TypeError, AttributeError):
        raise InputError(f"{path}: the time axis cannot be read as dates; give CF time "
                         "units.") from None
    sel = da.where(month.isin(months), drop=True)
    return sel.groupby(year.where(month.isin(months), drop=True).rename("year")).mean(str(tname))


def model_fields(path: Path, var: str | None, season: list[int], cell_lon: FloatArray,
                 cell_lat: FloatArray, distributed: bool = False, chunks: int = 365
                 ) -> list[tuple[str, str, NDArray[np.int_], FloatArray]]:
    """Annual season-mean fields of every model in a file, on the survey cells.

    The file is opened lazily (dask, the file's own time chunks), reduced and
    interpolated chunk by chunk, computed, and closed before returning, so no
    file handle outlives the call.

    Returns
    -------
    list
        ``(model, scenario, years, values)`` with values (year, cell) in degC.
    """
    import dask

    if not path.is_file():
        raise InputError(f"{path} does not exist; check the path.")
    try:
        ds = xr.open_dataset(path, chunks={})
    except Exception as exc:  # netCDF backends raise many error types
        raise InputError(f"{path} cannot be read as NetCDF ({type(exc).__name__}); check "
                         "that the file is complete.") from None
    out = []
    with ds:
        tdim = next((d for d in ds.dims if str(d).lower() in ("time", "t")), None)
        if tdim is not None:
            # Keep the file's own chunks along time (reading across them reads twice); only
            # merge them when they are very short.
            first = ds.chunks.get(tdim, (ds.sizes[tdim],))[0] if ds.chunks else ds.sizes[tdim]
            if first < 28:
                ds = ds.chunk({tdim: chunks})
        candidates = [v for v in ds.data_vars if ds[v].ndim >= 3]
        if var is None:
            if len(candidates) != 1:
                raise InputError(f"{path}: name the bottom-temperature variable with --var "
                                 f"(variables present: {', '.join(map(str, ds.data_vars))}).")
            var = str(candidates[0])
        if var not in ds.data_vars:
            raise InputError(f"{path} has no variable {var!r}; variables present: "
                             f"{', '.join(map(str, ds.data_vars))}.")
        lat_name = _find(ds, LAT_NAMES, path, "latitude")
        lon_name = _find(ds, LON_NAMES, path, "longitude")
        lat = np.asarray(ds[lat_name].values, float)
        center = central_lon(cell_lon)
        lon = unwrap_lon(np.asarray(ds[lon_name].values, float), center)
        tlon = unwrap_lon(cell_lon, center)
        da = _to_celsius(ds[var], path)
        if lat.ndim == 1:
            W = bilinear_weights(lon, lat, tlon, cell_lat)
            space: tuple = (ds[lat_name].dims[0], ds[lon_name].dims[0])
        else:
            W = barycentric_weights(lon, lat, tlon, cell_lat)
            space = tuple(ds[lat_name].dims)
        if W.getnnz(axis=1).min() == 0:
            raise InputError(f"{path}: the model grid does not cover every survey cell; give "
                             "fields that cover the domain.")
        models = ([str(m) for m in ds["model"].values] if "model" in da.dims
                  else [str(ds.attrs.get("model", path.stem))])
        scenario = str(ds.attrs.get("scenario", "default"))
        for k, name in enumerate(models):
            d = da.isel(model=k) if "model" in da.dims else da
            annual = _season_means(d, season, path).transpose("year", *space)
            flat = annual.data.reshape(annual.shape[0], -1)
            cells = flat.map_blocks(lambda b, W=W: np.asarray((W @ b.T).T), dtype=float,
                                    chunks=(flat.chunks[0], (W.shape[0],)))
            if distributed:
                values = np.asarray(cells.compute())
            else:
                with dask.config.set(scheduler="threads", num_workers=2):
                    values = np.asarray(cells.compute())
            out.append((name, scenario, annual["year"].values.astype(int), values))
    return out


def adjust_cells(model: FloatArray, model_years: NDArray[np.int_], obs: FloatArray,
                 obs_years: NDArray[np.int_], method: str, calibration: tuple[int, int]
                 ) -> FloatArray:
    """Adjust (year, cell) model temperatures per cell against observed fields.

    ``qmap`` is :func:`coldindex.project.quantile_map` cell by cell: one quantile
    definition (Hazen positions) for the model and the observed calibration
    fields, so observed fields mapped onto themselves come back unchanged.
    """
    if method == "none":
        return model
    mcal = model[(model_years >= calibration[0]) & (model_years <= calibration[1])]
    ocal = obs[(obs_years >= calibration[0]) & (obs_years <= calibration[1])]
    ocal = ocal[np.isfinite(ocal).all(axis=1)]
    if len(mcal) < 5 or len(ocal) < 5:
        raise InputError(f"The calibration period {calibration[0]}-{calibration[1]} holds "
                         f"{len(mcal)} model years and {len(ocal)} observed years with "
                         "fields; it needs at least 5 of each.")
    if method == "delta":
        return model + (ocal.mean(axis=0) - mcal.mean(axis=0))
    if method == "qmap":
        out = np.empty_like(model)
        for c in range(model.shape[1]):
            out[:, c] = quantile_map(model[:, c], mcal[:, c], ocal[:, c])
        return out
    raise InputError(f"--adjust {method} is not available on the gridded path; use none, "
                     "delta or qmap.")


def index_from_fields(fields: FloatArray, cell_area: FloatArray, column: str) -> FloatArray:
    """The index named ``column`` for each (year, cell) field (map areas; no SD)."""
    if column == "bottom_mean_c":
        return np.array([area_weighted_mean(f, cell_area) for f in fields])
    t = threshold_from_column(column)
    if t is None:
        raise InputError(f"The gridded path computes bottom_mean_c or below_<T>c_km2, not "
                         f"{column!r}.")
    return np.array([area_below(f, None, cell_area, t) for f in fields])


def trajectories_from_netcdf(paths: Sequence[Path], fields_path: Path, column: str,
                             var: str | None, season: str, adjust: str,
                             calibration: tuple[int, int] | None,
                             scheduler: str | None = None) -> pd.DataFrame:
    """Model trajectories of ``column`` from gridded NetCDF files.

    Returns
    -------
    pandas.DataFrame
        ``model``, ``scenario``, ``member``, ``year``, ``value`` (adjusted per cell).
    """
    from coldindex.config import parse_months

    months = parse_months(season, "--season")
    if not fields_path.is_file():
        raise InputError(f"{fields_path} does not exist; give the fields.nc of coldindex "
                         "index.")
    with xr.open_dataset(fields_path) as obs_ds:
        if "bottom_temperature" not in obs_ds or "cell_area" not in obs_ds:
            raise InputError(f"{fields_path} is not a coldindex fields.nc (no "
                             "bottom_temperature or cell_area).")
        mask = np.isfinite(obs_ds["cell_area"].values)
        cell_area = obs_ds["cell_area"].values[mask] / 1e6
        cell_lat = obs_ds["lat"].values[mask]
        cell_lon = obs_ds["lon"].values[mask]
        obs = obs_ds["bottom_temperature"].values[:, mask].astype(float)
        obs_years = obs_ds["year"].values.astype(int)
    client_ctx: Any = nullcontext()
    if scheduler:
        from distributed import Client

        try:
            client_ctx = Client(scheduler, timeout="10s")
        except OSError as exc:
            raise InputError(f"Cannot reach the dask scheduler at {scheduler} ({exc}).") from None
    rows = []
    with client_ctx:
        for path in paths:
            for name, scenario, years, model in model_fields(Path(path), var, months, cell_lon,
                                                              cell_lat, bool(scheduler)):
                cal = calibration or (int(max(years.min(), obs_years.min())),
                                      int(min(years.max(), obs_years.max())))
                adjusted = adjust_cells(model, years, obs, obs_years, adjust, cal)
                values = index_from_fields(adjusted, cell_area, column)
                rows += [(name, scenario, "r1", int(y), float(v))
                         for y, v in zip(years, values, strict=True)]
    return pd.DataFrame(rows, columns=["model", "scenario", "member", "year", "value"])
