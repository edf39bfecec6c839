"""Gridded sea ice to monthly regional series: area, extent, volume and mass.

Per time step and region:

* **area** = Σ concentration × cell area inside the region [km²];
* **extent** = Σ cell area inside the region over the cells whose concentration is
  at least the extent threshold (15 % by convention) [km²];
* **volume** = Σ concentration × floe thickness × cell area [km³]; a thickness that is
  already a mean over the whole cell (CF ``cell_methods: area: mean where sea``) is
  not multiplied by the concentration;
* **mass** = volume × ice density [Gt].

Daily fields are averaged into months. Cell areas are computed on the WGS 84
ellipsoid, never from a nominal resolution: exactly for cells bounded by meridians
and parallels (the authalic-latitude formula), as geodesic polygons through the
cell's (densified) corners otherwise (``pyproj.Geod``). A cell on a region's edge
counts with the share of its area inside the region (the intersection taken in the
region's own equal-area projection, so a region across 180° behaves as any other).

Everything here takes arrays and xarray objects (lazy, dask-backed ones stream
chunk by chunk) and returns frames; nothing opens files.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
import pyproj
import shapely
import xarray as xr
from numpy.typing import ArrayLike, NDArray

from coldindex.domain import Domain, unwrap_lon

FloatArray = NDArray[np.float64]
WGS84 = pyproj.Geod(ellps="WGS84")
QUANTITIES = ("area_km2", "extent_km2", "volume_km3", "mass_gt")
REGION_MARGIN_DEG = 2.0  # cells farther than this outside a region's lon/lat box are skipped


def axis_bounds(centres: ArrayLike) -> FloatArray:
    """Cell edges of a 1-D axis from its centres (midpoints; ends mirrored).

    Parameters
    ----------
    centres
        Monotonic cell centres (n,).

    Returns
    -------
    numpy.ndarray
        Edges (n + 1,).
    """
    c = np.asarray(centres, dtype=float)
    if c.size == 1:
        raise ValueError("an axis of one cell has no spacing to derive its edges from")
    mid = (c[1:] + c[:-1]) / 2.0
    return np.concatenate([[c[0] - (mid[0] - c[0])], mid, [c[-1] + (c[-1] - mid[-1])]])


def unwrapped_lon_axis(lon: ArrayLike) -> FloatArray:
    """A longitude axis made continuous (no jump at 180° or 360°). [degrees_east]"""
    return np.rad2deg(np.unwrap(np.deg2rad(np.asarray(lon, dtype=float))))


def _authalic_q(lat_deg: FloatArray, e: float) -> FloatArray:
    s = np.sin(np.deg2rad(lat_deg))
    return (1.0 - e * e) * (s / (1.0 - e * e * s * s)
                            - np.log((1.0 - e * s) / (1.0 + e * s)) / (2.0 * e))


def lonlat_cell_areas_km2(lon_edges: ArrayLike, lat_edges: ArrayLike,
                          geod: pyproj.Geod = WGS84) -> FloatArray:
    """Areas of cells bounded by meridians and parallels on the ellipsoid. [km²]

    Parameters
    ----------
    lon_edges
        Continuous longitude edges (nx + 1,). [degrees_east]
    lat_edges
        Latitude edges (ny + 1,), either order. [degrees_north]
    geod
        The ellipsoid.

    Returns
    -------
    numpy.ndarray
        Areas, shape (ny, nx).

    References
    ----------
    Snyder, J. P. (1987). Map projections: a working manual. USGS Professional
    Paper 1395, eq. 3-12 (q, the authalic function): the area between two parallels
    over a longitude span is ``a² Δλ |q(φ2) - q(φ1)| / 2``.
    """
    a, e = geod.a, np.sqrt(geod.es)
    q = _authalic_q(np.clip(np.asarray(lat_edges, dtype=float), -90.0, 90.0), e)
    band = np.abs(np.diff(q)) * a * a / 2.0
    dlon = np.abs(np.deg2rad(np.diff(np.asarray(lon_edges, dtype=float))))
    return np.outer(band, dlon) / 1e6


def polygon_areas_km2(vert_lon: ArrayLike, vert_lat: ArrayLike,
                      geod: pyproj.Geod = WGS84) -> FloatArray:
    """Geodesic areas of cells given by their vertices, in order around each cell. [km²]

    Parameters
    ----------
    vert_lon, vert_lat
        Vertices, shape (n, k). [degrees]
    geod
        The ellipsoid.

    Returns
    -------
    numpy.ndarray
        Areas (n,), NaN for a cell with a non-finite vertex.

    References
    ----------
    Karney, C. F. F. (2013). Algorithms for geodesics. J. Geodesy 87, 43-55
    (the polygon area of ``pyproj.Geod.polygon_area_perimeter``).
    """
    lo = np.asarray(vert_lon, dtype=float)
    la = np.asarray(vert_lat, dtype=float)
    out = np.full(lo.shape[0], np.nan)
    for i in range(lo.shape[0]):
        if np.all(np.isfinite(lo[i])) and np.all(np.isfinite(la[i])):
            area, _ = geod.polygon_area_perimeter(lo[i], la[i])
            out[i] = abs(area) / 1e6
    return out


def corner_grid(x: ArrayLike, y: ArrayLike, subdivide: int = 4) -> tuple[FloatArray, FloatArray]:
    """Vertices of every cell of a regular 1-D x/y grid, edges densified. [grid units]

    Parameters
    ----------
    x, y
        Cell centres (nx,), (ny,).
    subdivide
        Segments per cell edge.

    Returns
    -------
    tuple
        ``(vx, vy)``, each (ny, nx, 4 * subdivide), counter-clockwise from the lower left.
    """
    xb, yb = axis_bounds(x), axis_bounds(y)
    t = np.arange(subdivide) / subdivide
    x0, x1 = xb[:-1][None, :, None], xb[1:][None, :, None]
    y0, y1 = yb[:-1][:, None, None], yb[1:][:, None, None]
    one = np.ones((len(yb) - 1, len(xb) - 1, subdivide))
    vx = np.concatenate([(x0 + (x1 - x0) * t) * one, x1 * one, (x1 - (x1 - x0) * t) * one,
                         x0 * one], axis=2)
    vy = np.concatenate([y0 * one, (y0 + (y1 - y0) * t) * one, y1 * one,
                         (y1 - (y1 - y0) * t) * one], axis=2)
    return vx, vy


def corners_from_centres_2d(lon: ArrayLike, lat: ArrayLike) -> tuple[FloatArray, FloatArray]:
    """Vertices of a curvilinear lon/lat grid from its 2-D centres (no bounds given).

    Corners are the means of the four surrounding centres, the grid first extended
    by one cell on every side by linear extrapolation; longitudes are unwrapped
    around each cell so a grid across 180° gives no spurious cells.

    Parameters
    ----------
    lon, lat
        Cell centres, (ny, nx). [degrees]

    Returns
    -------
    tuple
        ``(vert_lon, vert_lat)``, each (ny, nx, 4).
    """
    lo = np.asarray(lon, dtype=float)
    la = np.asarray(lat, dtype=float)
    ref = lo[lo.shape[0] // 2, lo.shape[1] // 2]
    lo = unwrap_lon(lo, float(ref))

    def extend(a: FloatArray) -> FloatArray:
        a = np.vstack([2 * a[0] - a[1], a, 2 * a[-1] - a[-2]])
        return np.hstack([2 * a[:, :1] - a[:, 1:2], a, 2 * a[:, -1:] - a[:, -2:-1]])

    elo, ela = extend(lo), extend(la)
    clo = (elo[:-1, :-1] + elo[1:, :-1] + elo[:-1, 1:] + elo[1:, 1:]) / 4.0
    cla = (ela[:-1, :-1] + ela[1:, :-1] + ela[:-1, 1:] + ela[1:, 1:]) / 4.0
    vlo = np.stack([clo[:-1, :-1], clo[:-1, 1:], clo[1:, 1:], clo[1:, :-1]], axis=2)
    vla = np.stack([cla[:-1, :-1], cla[:-1, 1:], cla[1:, 1:], cla[1:, :-1]], axis=2)
    return vlo, np.clip(vla, -90.0, 90.0)


@dataclass(frozen=True)
class GridCells:
    """The cells of an ice grid: vertices in lon/lat and (optionally) exact areas.

    Attributes
    ----------
    vert_lon, vert_lat
        Vertices of every cell, (ny, nx, k), in order around the cell. [degrees]
    area_km2
        Cell areas (ny, nx) when known exactly (meridian/parallel cells); None to
        compute geodesic polygon areas from the vertices. [km²]
    """

    vert_lon: FloatArray
    vert_lat: FloatArray
    area_km2: FloatArray | None = None

    @property
    def shape(self) -> tuple[int, int]:
        """Grid shape (ny, nx)."""
        return (int(self.vert_lon.shape[0]), int(self.vert_lon.shape[1]))


def lonlat_grid_cells(lon: ArrayLike, lat: ArrayLike, lon_edges: ArrayLike | None = None,
                      lat_edges: ArrayLike | None = None) -> GridCells:
    """Cells of a regular lon/lat grid (1-D axes), with exact ellipsoidal areas.

    Parameters
    ----------
    lon, lat
        Axis centres. [degrees]
    lon_edges, lat_edges
        Axis edges when the file gives them (CF ``bounds``); else midpoints.

    Returns
    -------
    GridCells
        Vertices and exact areas.
    """
    lo = unwrapped_lon_axis(lon)
    lob = (unwrapped_lon_axis(lon_edges) if lon_edges is not None else axis_bounds(lo))
    lab = np.clip(np.asarray(lat_edges, dtype=float) if lat_edges is not None
                  else axis_bounds(lat), -90.0, 90.0)
    area = lonlat_cell_areas_km2(lob, lab)
    ny, nx = len(lab) - 1, len(lob) - 1
    x0, x1 = lob[:-1][None, :], lob[1:][None, :]
    y0, y1 = lab[:-1][:, None], lab[1:][:, None]
    vlo = np.stack([np.broadcast_to(v, (ny, nx)) for v in (x0, x1, x1, x0)], axis=2)
    vla = np.stack([np.broadcast_to(v, (ny, nx)) for v in (y0, y0, y1, y1)], axis=2)
    return GridCells(vert_lon=vlo.astype(float), vert_lat=vla.astype(float), area_km2=area)


def projected_grid_cells(x_m: ArrayLike, y_m: ArrayLike, crs: pyproj.CRS,
                         subdivide: int = 4) -> GridCells:
    """Cells of a regular projected grid (1-D x/y axes in metres) in lon/lat.

    Parameters
    ----------
    x_m, y_m
        Projected cell centres. [m]
    crs
        The grid's projection (e.g. from its CF grid mapping).
    subdivide
        Segments per cell edge, so the geodesic polygon follows the projected edge.

    Returns
    -------
    GridCells
        Vertices; areas are geodesic polygon areas computed when needed.
    """
    vx, vy = corner_grid(x_m, y_m, subdivide)
    inv = pyproj.Transformer.from_crs(crs, crs.geodetic_crs, always_xy=True)
    lon, lat = inv.transform(vx, vy)
    return GridCells(vert_lon=np.asarray(lon, float), vert_lat=np.asarray(lat, float))


@dataclass(frozen=True)
class RegionWeights:
    """Where a region lies on an ice grid.

    Attributes
    ----------
    name
        Region name.
    rows, cols
        The smallest index box (y, x) holding every cell that touches the region.
    weight_km2
        Area of each cell of that box inside the region, (rows, cols). [km²]
    """

    name: str
    rows: slice
    cols: slice
    weight_km2: FloatArray

    @property
    def area_km2(self) -> float:
        """The region's area covered by the grid. [km²]"""
        return float(self.weight_km2.sum())


def region_weights(cells: GridCells, regions: Mapping[str, Domain]) -> list[RegionWeights]:
    """Area of every grid cell inside every region.

    Parameters
    ----------
    cells
        The grid's cells.
    regions
        Regions by name (each a :class:`~coldindex.domain.Domain` with its
        equal-area projection).

    Returns
    -------
    list of RegionWeights
        One per region, in the order given; a region the grid does not reach has an
        empty box and zero weights.
    """
    ny, nx = cells.shape
    k = cells.vert_lon.shape[2]
    out = []
    for name, dom in regions.items():
        minx, miny, maxx, maxy = dom.polygon_lonlat.bounds
        vlo = unwrap_lon(cells.vert_lon, dom.lon0)
        vla = cells.vert_lat
        with np.errstate(invalid="ignore"):
            near = (np.all(np.isfinite(vlo), axis=2) & np.all(np.isfinite(vla), axis=2)
                    & (vlo.max(axis=2) >= minx - REGION_MARGIN_DEG)
                    & (vlo.min(axis=2) <= maxx + REGION_MARGIN_DEG)
                    & (vla.max(axis=2) >= miny - REGION_MARGIN_DEG)
                    & (vla.min(axis=2) <= maxy + REGION_MARGIN_DEG)
                    & (vlo.max(axis=2) - vlo.min(axis=2) < 90.0))
        iy, ix = np.nonzero(near)
        frac = np.zeros(len(iy))
        if len(iy):
            px, py = dom.to_xy(vlo[iy, ix], vla[iy, ix])
            coords = np.stack([px, py], axis=2).reshape(len(iy), k, 2)
            polys = shapely.polygons(coords)
            polys = shapely.make_valid(polys)
            own = shapely.area(polys)
            inside = shapely.area(shapely.intersection(polys, dom.polygon_xy))
            with np.errstate(invalid="ignore", divide="ignore"):
                frac = np.where(own > 0, np.clip(inside / own, 0.0, 1.0), 0.0)
        touch = frac > 0
        iy, ix, frac = iy[touch], ix[touch], frac[touch]
        if len(iy) == 0:
            out.append(RegionWeights(name, slice(0, 0), slice(0, 0), np.zeros((0, 0))))
            continue
        if cells.area_km2 is not None:
            area = cells.area_km2[iy, ix]
        else:
            area = polygon_areas_km2(cells.vert_lon[iy, ix], cells.vert_lat[iy, ix])
        rows = slice(int(iy.min()), int(iy.max()) + 1)
        cols = slice(int(ix.min()), int(ix.max()) + 1)
        w = np.zeros((rows.stop - rows.start, cols.stop - cols.start))
        w[iy - rows.start, ix - cols.start] = frac * np.nan_to_num(area)
        out.append(RegionWeights(name, rows, cols, w))
    del ny, nx
    return out


def regional_sums(concentration: xr.DataArray, thickness: xr.DataArray | None,
                  weights: Sequence[RegionWeights], *, floe_thickness: bool,
                  extent_threshold: float = 0.15, density_kg_m3: float = 917.0
                  ) -> xr.Dataset:
    """Area, extent, volume and mass of every region at every time step, lazily.

    Parameters
    ----------
    concentration
        Ice concentration as a fraction 0..1, dims (time, y, x); NaN (land, missing)
        counts as no ice. May be dask-backed.
    thickness
        Ice thickness on the same grid, or None. [m]
    weights
        Regions on this grid (:func:`region_weights`).
    floe_thickness
        True when the thickness is the floe thickness (mean where sea ice): volume
        = concentration × thickness × area; False when it is already a mean over
        the cell (mean where sea): volume = thickness × area.
    extent_threshold
        Concentration from which a cell counts toward the extent.
    density_kg_m3
        Ice density for the mass. [kg m-3]

    Returns
    -------
    xarray.Dataset
        Variables ``area_km2``, ``extent_km2`` and, with thickness, ``volume_km3`` and
        ``mass_gt``, dims (time, region); lazy when the inputs are.

    References
    ----------
    Parkinson, C. L., Cavalieri, D. J., Gloersen, P., Zwally, H. J. and Comiso, J. C.
    (1999). Arctic sea ice extents, areas, and trends, 1978-1996. J. Geophys. Res.
    104(C9), 20837-20856 (ice area and ice extent with the 15 % threshold).
    """
    per_region: dict[str, list[xr.DataArray]] = {q: [] for q in QUANTITIES}
    names = []
    ydim, xdim = concentration.dims[-2], concentration.dims[-1]
    for rw in weights:
        names.append(rw.name)
        if rw.weight_km2.size == 0:
            zero = xr.zeros_like(concentration.isel({ydim: 0, xdim: 0}), dtype=float)
            for q in QUANTITIES[:2] if thickness is None else QUANTITIES:
                per_region[q].append(zero)
            continue
        w = xr.DataArray(rw.weight_km2, dims=(ydim, xdim))
        c = concentration.isel({ydim: rw.rows, xdim: rw.cols})
        c = c.where((c >= 0) & (c <= 1))
        per_region["area_km2"].append((c * w).sum((ydim, xdim), skipna=True))
        per_region["extent_km2"].append(((c >= extent_threshold) * w).sum((ydim, xdim)))
        if thickness is not None:
            h = thickness.isel({ydim: rw.rows, xdim: rw.cols})
            h = h.where(h >= 0)
            per_cell = h * c if floe_thickness else h
            vol = (per_cell * w).sum((ydim, xdim), skipna=True) * 1e-3  # m x km2 -> km3
            per_region["volume_km3"].append(vol)
            per_region["mass_gt"].append(vol * density_kg_m3 * 1e-3)  # km3 x kg/m3 -> Gt
    data = {q: xr.concat(v, dim=pd.Index(names, name="region"))
            for q, v in per_region.items() if len(v) == len(names) and v}
    return xr.Dataset(data)


def monthly_table(sums: xr.Dataset, years: ArrayLike, months: ArrayLike) -> pd.DataFrame:
    """Monthly means of computed regional sums, tidy.

    Parameters
    ----------
    sums
        Computed :func:`regional_sums` (dims time, region).
    years, months
        Calendar year and month of each time step.

    Returns
    -------
    pandas.DataFrame
        ``year``, ``month``, ``region``, ``quantity``, ``value``, ``n_times``, sorted.
    """
    frames = []
    for q in QUANTITIES:
        if q not in sums:
            continue
        da = sums[q].transpose(..., "region")
        values = np.asarray(da.values, dtype=float).reshape(len(np.atleast_1d(years)), -1)
        regions = [str(r) for r in sums["region"].values]
        df = pd.DataFrame(values, columns=regions)
        df["year"] = np.asarray(years, dtype=int)
        df["month"] = np.asarray(months, dtype=int)
        long = df.melt(id_vars=["year", "month"], var_name="region", value_name="value")
        g = long.groupby(["year", "month", "region"], sort=True)["value"]
        agg = g.agg(["mean", "size"]).reset_index()
        frames.append(pd.DataFrame({"year": agg["year"], "month": agg["month"],
                                    "region": agg["region"], "quantity": q,
                                    "value": agg["mean"], "n_times": agg["size"]}))
    out = pd.concat(frames, ignore_index=True)
    order = {q: i for i, q in enumerate(QUANTITIES)}
    out["_q"] = out["quantity"].map(order)
    out = out.sort_values(["region", "_q", "year", "month"], kind="stable")
    return out.drop(columns="_q").reset_index(drop=True)


def series_for_skill(table: pd.DataFrame, quantity: str, region: str) -> pd.DataFrame:
    """The monthly ice series (``year``, ``month``, ``ice``) the skill stage reads.

    Parameters
    ----------
    table
        The tidy table of :func:`monthly_table`.
    quantity
        One of ``area_km2``, ``extent_km2``, ``volume_km3``, ``mass_gt``.
    region
        Region name; empty picks the only region.

    Returns
    -------
    pandas.DataFrame
        ``year``, ``month``, ``ice`` (float).
    """
    from coldindex.errors import ConfigError

    regions = sorted(table["region"].unique())
    if not region:
        if len(regions) != 1:
            raise ConfigError(f"ice_fields.region needs to name one of the regions "
                              f"({', '.join(regions)}), got: ''.")
        region = regions[0]
    if region not in regions:
        raise ConfigError(f"ice_fields.region needs to be one of {', '.join(regions)}, got: "
                          f"{region!r}.")
    have = sorted(table["quantity"].unique())
    if quantity not in have:
        raise ConfigError(f"ice_fields.quantity needs to be one of {', '.join(have)} (the "
                          f"fields hold no thickness for volume or mass), got: {quantity!r}.")
    sub = table[(table["region"] == region) & (table["quantity"] == quantity)]
    return pd.DataFrame({"year": sub["year"].astype(int).to_numpy(),
                         "month": sub["month"].astype(int).to_numpy(),
                         "ice": sub["value"].astype(float).to_numpy()})
