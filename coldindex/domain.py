"""Survey domain, antimeridian handling, equal-area projection and grid.

All geometry is done in an Albers equal-area conic projection centred on the
domain, in kilometres. Longitudes are first unwrapped around the domain's
centre, so a domain across 180° behaves exactly like one that does not.
Grid cells on the domain's edge carry their fractional area (polygon ∩ cell),
so the cells add up to the polygon's own area.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property

import numpy as np
import pyproj
import shapely
from numpy.typing import ArrayLike, NDArray
from scipy.spatial import cKDTree
from shapely.geometry import MultiPolygon, Polygon, mapping, shape
from shapely.geometry.base import BaseGeometry

from coldindex.errors import InputError

FloatArray = NDArray[np.float64]
KM_PER_DEG = 111.195  # mean great-circle km per degree of latitude (R = 6371 km)


def wrap_lon(lon: ArrayLike) -> FloatArray:
    """Wrap longitudes into [-180, 180). [degrees_east]"""
    return (np.asarray(lon, dtype=float) + 180.0) % 360.0 - 180.0


def unwrap_lon(lon: ArrayLike, center: float) -> FloatArray:
    """Unwrap longitudes into [center - 180, center + 180). [degrees_east]"""
    return center + wrap_lon(np.asarray(lon, dtype=float) - center)


def circular_mean_lon(lon: ArrayLike) -> float:
    """Circular mean of longitudes, in [-180, 180). [degrees_east]"""
    rad = np.deg2rad(np.asarray(lon, dtype=float))
    return float(wrap_lon(np.rad2deg(np.arctan2(np.sin(rad).mean(), np.cos(rad).mean()))))


def central_lon(lon: ArrayLike) -> float:
    """Middle of the longitude range spanned by a set of points, either convention.

    The points are unwrapped around their circular mean, and the centre of their
    range taken, so vertex density does not pull the centre. [degrees_east]
    """
    lon = np.asarray(lon, dtype=float)
    u = unwrap_lon(lon, circular_mean_lon(lon))
    return round(float(wrap_lon(0.5 * (u.min() + u.max()))), 6)


def albers_for(lon0: float, lat_min: float, lat_max: float) -> pyproj.CRS:
    """Albers equal-area conic for a latitude band, central meridian ``lon0``.

    The standard parallels lie one sixth of the band inside its edges, the usual
    rule for a conic that keeps scale error small over the band.

    References
    ----------
    Snyder, J. P. (1987). Map Projections: A Working Manual. USGS Professional
    Paper 1395, p. 99 (choice of standard parallels).
    """
    span = max(lat_max - lat_min, 0.5)
    lat1 = lat_min + span / 6.0
    lat2 = lat_max - span / 6.0
    lat0 = 0.5 * (lat_min + lat_max)
    return pyproj.CRS.from_proj4(
        f"+proj=aea +lat_1={lat1:.6f} +lat_2={lat2:.6f} +lat_0={lat0:.6f} "
        f"+lon_0={lon0:.6f} +x_0=0 +y_0=0 +datum=WGS84 +units=m +no_defs"
    )


def _map_coords(geom: BaseGeometry, func) -> BaseGeometry:
    return shapely.transform(geom, func)


@dataclass(frozen=True)
class Domain:
    """A survey domain with its equal-area projection.

    Attributes
    ----------
    polygon_lonlat
        Domain polygon in lon/lat, longitudes unwrapped around ``lon0``.
    lon0
        Central longitude of the domain. [degrees_east]
    crs
        Albers equal-area conic projection centred on the domain.
    polygon_xy
        The densified domain polygon in projected coordinates. [km]
    """

    polygon_lonlat: BaseGeometry
    lon0: float
    crs: pyproj.CRS
    polygon_xy: BaseGeometry

    @cached_property
    def _fwd(self) -> pyproj.Transformer:
        return pyproj.Transformer.from_crs(self.crs.geodetic_crs, self.crs, always_xy=True)

    @cached_property
    def _inv(self) -> pyproj.Transformer:
        return pyproj.Transformer.from_crs(self.crs, self.crs.geodetic_crs, always_xy=True)

    def to_xy(self, lon: ArrayLike, lat: ArrayLike) -> tuple[FloatArray, FloatArray]:
        """Project lon/lat to the domain's equal-area plane. [km]"""
        x, y = self._fwd.transform(unwrap_lon(lon, self.lon0), np.asarray(lat, dtype=float))
        return np.asarray(x) / 1000.0, np.asarray(y) / 1000.0

    def to_lonlat(self, x_km: ArrayLike, y_km: ArrayLike) -> tuple[FloatArray, FloatArray]:
        """Inverse projection; longitudes wrapped into [-180, 180). [degrees]"""
        lon, lat = self._inv.transform(np.asarray(x_km, dtype=float) * 1000.0,
                                       np.asarray(y_km, dtype=float) * 1000.0)
        return wrap_lon(lon), np.asarray(lat, dtype=float)

    def contains(self, lon: ArrayLike, lat: ArrayLike) -> NDArray[np.bool_]:
        """Whether each position lies inside the domain (boundary included)."""
        x, y = self.to_xy(lon, lat)
        return np.asarray(shapely.intersects_xy(self.polygon_xy, x, y), dtype=bool)

    @property
    def area_km2(self) -> float:
        """Area of the domain polygon. [km2]"""
        return float(self.polygon_xy.area)

    def to_geojson(self) -> dict:
        """GeoJSON Feature of the domain, longitudes wrapped into [-180, 180)."""
        wrapped = _map_coords(self.polygon_lonlat,
                              lambda c: np.column_stack([wrap_lon(c[:, 0]), c[:, 1]]))
        return {"type": "Feature", "properties": {"lon0": self.lon0},
                "geometry": mapping(wrapped)}


def domain_from_polygon(geom: BaseGeometry, densify_deg: float = 0.05) -> Domain:
    """Build a :class:`Domain` from a lon/lat polygon, either longitude convention.

    Edges are taken as straight lines in lon/lat (GeoJSON's convention) and
    densified every ``densify_deg`` degrees before projection, so the projected
    polygon follows them.

    Parameters
    ----------
    geom
        Polygon or MultiPolygon in lon/lat. [degrees]
    densify_deg
        Largest edge length before projection. [degrees]

    Returns
    -------
    Domain
        The domain with its Albers projection.
    """
    if not isinstance(geom, (Polygon, MultiPolygon)) or geom.is_empty:
        raise InputError("The domain must be one non-empty Polygon or MultiPolygon in lon/lat.")
    coords = shapely.get_coordinates(geom)
    if np.any(np.abs(coords[:, 1]) > 90):
        raise InputError("The domain polygon has latitudes outside -90..90; GeoJSON lists "
                         "longitude first, then latitude.")
    lon0 = central_lon(coords[:, 0])
    unwrapped = _map_coords(geom, lambda c: np.column_stack([unwrap_lon(c[:, 0], lon0),
                                                             c[:, 1]]))
    unwrapped = shapely.make_valid(shapely.segmentize(unwrapped, densify_deg))
    if not isinstance(unwrapped, (Polygon, MultiPolygon)):
        unwrapped = shapely.unary_union([g for g in getattr(unwrapped, "geoms", [unwrapped])
                                         if isinstance(g, (Polygon, MultiPolygon))])
    lats = shapely.get_coordinates(unwrapped)[:, 1]
    crs = albers_for(lon0, float(lats.min()), float(lats.max()))
    fwd = pyproj.Transformer.from_crs(crs.geodetic_crs, crs, always_xy=True)

    def project(c: FloatArray) -> FloatArray:
        x, y = fwd.transform(c[:, 0], c[:, 1])
        return np.column_stack([np.asarray(x) / 1000.0, np.asarray(y) / 1000.0])

    polygon_xy = _map_coords(unwrapped, project)
    return Domain(polygon_lonlat=unwrapped, lon0=lon0, crs=crs, polygon_xy=polygon_xy)


def domain_from_geojson(obj: dict) -> Domain:
    """Build a :class:`Domain` from a parsed GeoJSON object (Feature, collection or geometry)."""
    if obj.get("type") == "FeatureCollection":
        feats = obj.get("features") or []
        if len(feats) != 1:
            raise InputError(f"The domain GeoJSON must hold one feature, it holds {len(feats)}.")
        obj = feats[0]
    if obj.get("type") == "Feature":
        obj = obj.get("geometry") or {}
    try:
        geom = shape(obj)
    except Exception as exc:  # shapely raises several types for bad geometry
        raise InputError(f"The domain GeoJSON geometry cannot be read ({exc}).") from None
    return domain_from_polygon(geom)


def station_spacing_km(x_km: ArrayLike, y_km: ArrayLike) -> float:
    """Median nearest-neighbour distance between positions. [km]

    Returns NaN with fewer than two distinct positions.
    """
    pts = np.unique(np.column_stack([np.asarray(x_km, float), np.asarray(y_km, float)]), axis=0)
    if len(pts) < 2:
        return float("nan")
    dist, _ = cKDTree(pts).query(pts, k=2)
    return float(np.median(dist[:, 1]))


def derive_domain(lon: ArrayLike, lat: ArrayLike, year: ArrayLike, station: ArrayLike,
                  min_share: float = 0.5) -> Domain:
    """Derive a domain from the stations sampled in most years.

    Rule: keep the stations sampled in at least ``min_share`` of the survey
    years; draw a disk of radius 0.75 station spacings around each; close gaps
    narrower than two spacings (buffer out by one spacing, then back in); drop
    holes. The result is the area the regular stations represent.

    Parameters
    ----------
    lon, lat
        Cast positions. [degrees]
    year, station
        Survey year and station name of each cast.
    min_share
        Share of survey years a station must be sampled in.

    Returns
    -------
    Domain
        The derived domain (write it out and reuse it next year).
    """
    lon = np.asarray(lon, float)
    lat = np.asarray(lat, float)
    year = np.asarray(year)
    station = np.asarray(station).astype(str)
    n_years = len(np.unique(year))
    pairs = np.unique(np.column_stack([station, year.astype(str)]), axis=0)
    names, counts = np.unique(pairs[:, 0], return_counts=True)
    frequent = set(names[counts >= min_share * n_years])
    keep = np.array([s in frequent for s in station])
    if keep.sum() < 3:
        raise InputError("Too few stations are sampled in at least half of the years to derive "
                         "a domain; give a domain polygon with {option}.",
                         option=("inputs", "domain"))
    lon0 = central_lon(lon[keep])
    crs = albers_for(lon0, float(lat[keep].min()), float(lat[keep].max()))
    fwd = pyproj.Transformer.from_crs(crs.geodetic_crs, crs, always_xy=True)
    inv = pyproj.Transformer.from_crs(crs, crs.geodetic_crs, always_xy=True)
    # One position per station: the median of its casts, so the rule is order-free.
    st = station[keep]
    order = np.argsort(st, kind="stable")
    st_sorted = st[order]
    starts = np.r_[0, np.flatnonzero(st_sorted[1:] != st_sorted[:-1]) + 1]
    lon_u = unwrap_lon(lon[keep], lon0)[order]
    lat_k = lat[keep][order]
    mlon = np.array([np.median(s) for s in np.split(lon_u, starts[1:])])
    mlat = np.array([np.median(s) for s in np.split(lat_k, starts[1:])])
    x, y = fwd.transform(mlon, mlat)
    x = np.asarray(x) / 1000.0
    y = np.asarray(y) / 1000.0
    spacing = station_spacing_km(x, y)
    disks = shapely.buffer(shapely.points(x, y), 0.75 * spacing, quad_segs=8)
    area = shapely.unary_union(disks).buffer(spacing, quad_segs=8).buffer(-spacing, quad_segs=8)
    parts = [Polygon(p.exterior) for p in getattr(area, "geoms", [area]) if p.area > 0]
    area = shapely.simplify(MultiPolygon(parts) if len(parts) > 1 else parts[0],
                            0.05 * spacing)

    def to_lonlat(c: FloatArray) -> FloatArray:
        lo, la = inv.transform(c[:, 0] * 1000.0, c[:, 1] * 1000.0)
        return np.column_stack([np.round(wrap_lon(lo), 6), np.round(la, 6)])

    return domain_from_polygon(_map_coords(area, to_lonlat))


@dataclass(frozen=True)
class Grid:
    """A regular equal-area grid over a domain.

    Attributes
    ----------
    x, y
        Cell-centre coordinates along each axis. [km]
    cell_km
        Cell side. [km]
    area_km2
        Area of each cell inside the domain, shape (ny, nx); 0 outside. [km2]
    lon, lat
        Cell-centre longitude (wrapped into [-180, 180)) and latitude, (ny, nx).
    """

    x: FloatArray
    y: FloatArray
    cell_km: float
    area_km2: FloatArray
    lon: FloatArray
    lat: FloatArray

    @property
    def mask(self) -> NDArray[np.bool_]:
        """Cells with some area inside the domain, (ny, nx)."""
        return self.area_km2 > 0

    @property
    def shape(self) -> tuple[int, int]:
        """(ny, nx)."""
        return self.area_km2.shape

    def active_xy(self) -> FloatArray:
        """Centres of the cells inside the domain, (m, 2) in row-major order. [km]"""
        xx, yy = np.meshgrid(self.x, self.y)
        return np.column_stack([xx[self.mask], yy[self.mask]])

    def active_area(self) -> FloatArray:
        """Areas of the cells inside the domain, (m,). [km2]"""
        return self.area_km2[self.mask]

    def to_2d(self, values: ArrayLike) -> FloatArray:
        """Place per-active-cell values (..., m) back on the (..., ny, nx) grid, NaN outside."""
        v = np.asarray(values, dtype=float)
        out = np.full(v.shape[:-1] + self.shape, np.nan)
        out[..., self.mask] = v
        return out


def make_grid(domain: Domain, cell_km: float = 5.0) -> Grid:
    """Lay a regular grid of ``cell_km`` squares over the domain.

    The grid is anchored at whole multiples of ``cell_km`` in the projected plane,
    so the same domain always gives the same cells. Cells cut by the domain's
    edge carry the area of their intersection with the polygon.

    Parameters
    ----------
    domain
        The survey domain.
    cell_km
        Cell side. [km]

    Returns
    -------
    Grid
        The grid with its cell areas.
    """
    if not cell_km > 0:
        raise InputError(f"The grid cell size needs to be > 0 km, got: {cell_km}.")
    minx, miny, maxx, maxy = domain.polygon_xy.bounds
    x0 = np.floor(minx / cell_km) * cell_km
    y0 = np.floor(miny / cell_km) * cell_km
    nx = int(np.ceil((maxx - x0) / cell_km))
    ny = int(np.ceil((maxy - y0) / cell_km))
    if nx * ny > 4_000_000:
        raise InputError(f"A {cell_km} km grid over this domain would have {nx * ny} cells; "
                         "choose a larger {option}.", option=("index", "grid_km"))
    xe = x0 + cell_km * np.arange(nx + 1)
    ye = y0 + cell_km * np.arange(ny + 1)
    xx0, yy0 = np.meshgrid(xe[:-1], ye[:-1])
    boxes = shapely.box(xx0.ravel(), yy0.ravel(), xx0.ravel() + cell_km, yy0.ravel() + cell_km)
    poly = domain.polygon_xy
    shapely.prepare(poly)
    full = shapely.contains(poly, boxes)
    touching = shapely.intersects(poly, boxes) & ~full
    area = np.where(full, cell_km * cell_km, 0.0)
    area[touching] = shapely.area(shapely.intersection(boxes[touching], poly))
    xc = 0.5 * (xe[:-1] + xe[1:])
    yc = 0.5 * (ye[:-1] + ye[1:])
    lon, lat = domain.to_lonlat(*np.meshgrid(xc, yc))
    return Grid(x=xc, y=yc, cell_km=float(cell_km), area_km2=area.reshape(ny, nx),
                lon=lon, lat=lat)


def sample_lonlat_grid(lon_axis: ArrayLike, lat_axis: ArrayLike, values: ArrayLike,
                       lon: ArrayLike, lat: ArrayLike) -> FloatArray:
    """Bilinear interpolation of a regular lon/lat field at positions.

    The field's longitude axis may use either convention; both it and the
    positions are unwrapped around the axis' own centre before interpolating.

    Parameters
    ----------
    lon_axis, lat_axis
        1-D axes of the field. [degrees]
    values
        Field, shape (len(lat_axis), len(lon_axis)).
    lon, lat
        Positions to sample. [degrees]

    Returns
    -------
    numpy.ndarray
        Sampled values, NaN outside the field.
    """
    la = np.asarray(lat_axis, float)
    lo_raw = np.asarray(lon_axis, float)
    center = circular_mean_lon(lo_raw)
    lo = unwrap_lon(lo_raw, center)
    v = np.asarray(values, float)
    if np.any(np.diff(lo) < 0):
        order = np.argsort(lo)
        lo, v = lo[order], v[:, order]
    if la[0] > la[-1]:
        la, v = la[::-1], v[::-1, :]
    from scipy.interpolate import RegularGridInterpolator  # only the bathymetry needs it

    interp = RegularGridInterpolator((la, lo), v, bounds_error=False, fill_value=np.nan)
    pts = np.column_stack([np.asarray(lat, float).ravel(),
                           unwrap_lon(np.asarray(lon, float).ravel(), center)])
    return interp(pts).reshape(np.shape(lat))
