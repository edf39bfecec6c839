"""Regions and depth zones: per-cell area weights that split the domain's cells.

A region is a named polygon (GeoJSON feature with a ``name`` property); each grid
cell contributes the area of ``cell ∩ domain ∩ region``, computed exactly in the
domain's equal-area plane like the domain's own edge cells, so regions that cover
the domain give weights that add up to the cell areas. Overlapping regions are
refused. A depth zone ``lo-hi`` takes every cell whose centre depth (from the
bathymetry) lies in ``[lo, hi)``; depth zones are therefore whole cells.

The weights feed :func:`coldindex.indices.compute_indices`, which computes every
region's index from the same conditional realizations as the domain's, so the
region areas add up to the domain's realization by realization.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import shapely
from numpy.typing import ArrayLike, NDArray
from shapely.geometry import MultiPolygon, Polygon, shape

from coldindex.domain import Domain, Grid, _map_coords, unwrap_lon
from coldindex.errors import InputError

FloatArray = NDArray[np.float64]

#: Largest overlap between two regions, as a share of the smaller one, still taken
#: as a shared edge (digitising noise) rather than an overlap.
OVERLAP_TOLERANCE = 1e-6
#: Most regions in one file (each adds a row per year and a column per covariate).
MAX_REGIONS = 50
#: Most depth zones.


@dataclass(frozen=True)
class RegionWeights:
    """Per-cell area weights of named regions or zones.

    Attributes
    ----------
    names
        Region or zone names, in the order of ``weights``' rows.
    weights
        Area of each active cell inside each region, (n_regions, m). [km²]
    outside_km2
        Domain area outside every region. [km²]
    kind
        ``region`` or ``depth zone`` (used in notes).
    """

    names: tuple[str, ...]
    weights: FloatArray
    outside_km2: float
    kind: str = "region"


def _check_name(name: object, k: int, source: str) -> str:
    if not isinstance(name, str) or not name.strip():
        raise InputError(f"{source}: feature {k + 1} has no name property; give every region "
                         "a non-empty \"name\".")
    text = name.strip()
    if len(text) > 80:
        raise InputError(f"{source}: the region name {text[:40]!r}... is longer than 80 "
                         "characters; shorten it.")
    return text


def regions_from_geojson(obj: object, domain: Domain, source: str = "regions",
                         name_key: str = "name") -> list[tuple[str, Polygon | MultiPolygon]]:
    """Named region polygons in the domain's projected plane.

    Parameters
    ----------
    obj
        Parsed GeoJSON: a FeatureCollection (or one Feature) of Polygon or
        MultiPolygon features in lon/lat, each with a name property.
    domain
        The survey domain (its projection and longitude centre are used).
    source
        File name used in messages.
    name_key
        Property holding the region name.

    Returns
    -------
    list
        ``(name, polygon_xy)`` pairs in the file's order. [km]
    """
    if not isinstance(obj, dict):
        raise InputError(f"{source} is not a GeoJSON object; give a FeatureCollection.")
    feats = obj.get("features") if obj.get("type") == "FeatureCollection" else [obj]
    if not isinstance(feats, list) or not feats:
        raise InputError(f"{source} holds no features; give at least one named polygon.")
    if len(feats) > MAX_REGIONS:
        raise InputError(f"{source} holds {len(feats)} regions; at most {MAX_REGIONS} are "
                         "allowed.")
    out: list[tuple[str, Polygon | MultiPolygon]] = []
    for k, feat in enumerate(feats):
        if not isinstance(feat, dict) or feat.get("type") != "Feature":
            raise InputError(f"{source}: item {k + 1} is not a GeoJSON Feature.")
        props = feat.get("properties") or {}
        name = _check_name(props.get(name_key) if isinstance(props, dict) else None, k, source)
        try:
            geom = shape(feat.get("geometry") or {})
        except Exception:  # shapely raises several types for bad geometry
            raise InputError(f"{source}: the geometry of region {name!r} cannot be read; give "
                             "a Polygon or MultiPolygon in lon/lat.") from None
        if not isinstance(geom, (Polygon, MultiPolygon)) or geom.is_empty:
            raise InputError(f"{source}: region {name!r} is not a Polygon or MultiPolygon.")
        lonlat = shapely.get_coordinates(geom)
        if np.any(np.abs(lonlat[:, 1]) > 90):
            raise InputError(f"{source}: region {name!r} has latitudes outside -90..90; "
                             "GeoJSON lists longitude first.")
        dense = shapely.segmentize(
            _map_coords(geom, lambda c: np.column_stack([unwrap_lon(c[:, 0], domain.lon0),
                                                         c[:, 1]])), 0.05)

        def project(c: FloatArray) -> FloatArray:
            x, y = domain.to_xy(c[:, 0], c[:, 1])
            return np.column_stack([x, y])

        xy = shapely.make_valid(_map_coords(dense, project))
        if not isinstance(xy, (Polygon, MultiPolygon)):
            xy = shapely.unary_union([g for g in getattr(xy, "geoms", [xy])
                                      if isinstance(g, (Polygon, MultiPolygon))])
        out.append((name, xy))
    names = [n for n, _ in out]
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup:
        raise InputError(f"{source}: region names repeat ({', '.join(dup)}); give each region "
                         "one feature (a MultiPolygon for several parts).")
    for i in range(len(out)):
        for j in range(i + 1, len(out)):
            a, b = out[i][1], out[j][1]
            shared = a.intersection(b).area
            if shared > OVERLAP_TOLERANCE * min(a.area, b.area):
                raise InputError(f"{source}: regions {out[i][0]!r} and {out[j][0]!r} overlap "
                                 f"({shared:.4g} km²); regions must not overlap, so fix their "
                                 "boundaries.")
    return out


def region_weights(grid: Grid, domain: Domain,
                   regions: list[tuple[str, Polygon | MultiPolygon]]) -> RegionWeights:
    """Area of every active cell inside each region, split exactly by area.

    Parameters
    ----------
    grid
        The equal-area grid over the domain.
    domain
        The domain (cells are clipped to it first, like the grid's edge cells).
    regions
        ``(name, polygon_xy)`` pairs from :func:`regions_from_geojson`. [km]

    Returns
    -------
    RegionWeights
        The weights, (n_regions, m) [km²], and the domain area outside every region.
    """
    iy, ix = np.nonzero(grid.mask)
    h = grid.cell_km / 2.0
    xc, yc = grid.x[ix], grid.y[iy]
    cells = shapely.intersection(shapely.box(xc - h, yc - h, xc + h, yc + h),
                                 domain.polygon_xy)
    area = grid.active_area()
    w = np.zeros((len(regions), len(area)))
    for k, (_, poly) in enumerate(regions):
        shapely.prepare(poly)
        full = shapely.contains(poly, cells)
        part = shapely.intersects(poly, cells) & ~full
        w[k, full] = area[full]
        if part.any():
            w[k, part] = shapely.area(shapely.intersection(cells[part], poly))
    # A cell's parts never exceed the cell (rounding of the intersections).
    total = w.sum(axis=0)
    over = total > area
    if over.any():
        w[:, over] *= area[over] / total[over]
    return RegionWeights(names=tuple(n for n, _ in regions), weights=w,
                         outside_km2=float(max(area.sum() - w.sum(), 0.0)), kind="region")


def zone_name(lo: float, hi: float) -> str:
    """Name of a depth zone, e.g. ``depth 50-100 m``."""
    return f"depth {lo:g}-{hi:g} m"


def depth_zone_weights(depth_cells: ArrayLike, cell_area: ArrayLike,
                       zones: tuple[tuple[float, float], ...]) -> RegionWeights:
    """Whole-cell weights of depth zones from each cell's centre depth.

    Parameters
    ----------
    depth_cells
        Depth at each active cell's centre, positive down (a negative-down
        bathymetry is turned positive by the caller). [m]
    cell_area
        Active cell areas. [km²]
    zones
        ``(lo, hi)`` pairs from :func:`parse_depth_zones`; a cell belongs to a
        zone when ``lo <= depth < hi``. [m]

    Returns
    -------
    RegionWeights
        The weights and the domain area in no zone (including cells without depth).
    """
    d = np.asarray(depth_cells, float)
    a = np.asarray(cell_area, float)
    w = np.zeros((len(zones), len(a)))
    for k, (lo, hi) in enumerate(zones):
        inside = np.isfinite(d) & (d >= lo) & (d < hi)
        w[k, inside] = a[inside]
    return RegionWeights(names=tuple(zone_name(lo, hi) for lo, hi in zones), weights=w,
                         outside_km2=float(a.sum() - w.sum()), kind="depth zone")


def combine(parts: list[RegionWeights]) -> RegionWeights | None:
    """Stack regions and zones into one set of weights (None when there are none)."""
    parts = [p for p in parts if len(p.names)]
    if not parts:
        return None
    names = tuple(n for p in parts for n in p.names)
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup:
        raise InputError(f"A region is named like a depth zone ({', '.join(dup)}); rename "
                         "the region.")
    return RegionWeights(names=names, weights=np.vstack([p.weights for p in parts]),
                         outside_km2=float(sum(p.outside_km2 for p in parts)),
                         kind="+".join(p.kind for p in parts))


def node_weights(weights: FloatArray, node_of_cell: NDArray[np.int_] | None,
                 n_nodes: int) -> FloatArray:
    """Cell weights (r, m) summed onto simulation nodes (r, k). [km²]"""
    if node_of_cell is None:
        return np.asarray(weights, float)
    w = np.asarray(weights, float)
    out = np.zeros((w.shape[0], n_nodes))
    for k in range(w.shape[0]):
        out[k] = np.bincount(node_of_cell, weights=w[k], minlength=n_nodes)
    return out


def lines_from_geojson(obj: object, domain: Domain, source: str = "coastline"
                       ) -> list[FloatArray]:
    """Coastline lines in the domain's plane, for maps only. [km]

    Parameters
    ----------
    obj
        Parsed GeoJSON: any mix of (Multi)LineString and (Multi)Polygon geometries,
        features or collections, in lon/lat.
    domain
        The domain (its projection and longitude centre are used).
    source
        File name used in messages.

    Returns
    -------
    list
        Lines as (k, 2) arrays in the equal-area plane (polygon rings included). [km]
    """
    geoms: list[object] = []

    def collect(o: object) -> None:
        if not isinstance(o, dict):
            return
        kind = o.get("type")
        if kind == "FeatureCollection":
            for f in o.get("features") or []:
                collect(f)
        elif kind == "Feature":
            collect(o.get("geometry"))
        elif kind == "GeometryCollection":
            for g in o.get("geometries") or []:
                collect(g)
        elif kind is not None:
            try:
                geoms.append(shape(o))
            except Exception:  # shapely raises several types for bad geometry
                raise InputError(f"{source}: a {kind} geometry cannot be read; give lines or "
                                 "polygons in lon/lat.") from None

    collect(obj)
    if not geoms:
        raise InputError(f"{source} holds no line or polygon; give the coastline as GeoJSON "
                         "lines or polygons in lon/lat.")
    out: list[FloatArray] = []
    for g in geoms:
        for part in getattr(g, "geoms", [g]):
            rings = ([part.exterior, *part.interiors] if isinstance(part, Polygon)
                     else [part])
            for r in rings:
                c = np.asarray(getattr(r, "coords", []), float)
                if c.ndim != 2 or len(c) < 2:
                    continue
                x, y = domain.to_xy(c[:, 0], c[:, 1])
                out.append(np.column_stack([x, y]))
    return out
