import numpy as np
import pytest
import shapely
from pyproj import Geod
from shapely.geometry import Polygon

from coldindex.domain import (
    derive_domain,
    domain_from_polygon,
    make_grid,
    sample_lonlat_grid,
    unwrap_lon,
    wrap_lon,
)
from tests.conftest import BOX_180, synthetic_casts


def geodesic_area_km2(domain) -> float:
    # Independent reference: pyproj.Geod on the WGS84 ellipsoid (Karney 2013, J. Geodesy
    # 87:43-55), applied to the same densified lon/lat polygon.
    area, _ = Geod(ellps="WGS84").geometry_area_perimeter(domain.polygon_lonlat)
    return abs(area) / 1e6


def test_wrap_and_unwrap():
    assert wrap_lon(190.0) == pytest.approx(-170.0)
    assert unwrap_lon(-179.0, 179.0) == pytest.approx(181.0)
    assert wrap_lon(-180.0) == pytest.approx(-180.0)


@pytest.mark.parametrize("cell", [5.0, 10.0])
def test_grid_area_matches_geodesic_area(box_domain, cell):
    grid = make_grid(box_domain, cell)
    ref = geodesic_area_km2(box_domain)
    # Source: Snyder 1987 (USGS PP 1395), Albers is equal-area on the ellipsoid, so the
    # summed fractional cell areas must equal the geodesic area; 0.1 % per the issue.
    assert grid.area_km2.sum() == pytest.approx(ref, rel=1e-3)
    assert grid.area_km2.max() == pytest.approx(cell * cell)


def test_irregular_shelf_area_matches_geodesic():
    from coldindex.demo import SHELF

    dom = domain_from_polygon(Polygon(SHELF))
    grid = make_grid(dom, 5.0)
    assert grid.area_km2.sum() == pytest.approx(geodesic_area_km2(dom), rel=1e-3)


def test_rotation_across_antimeridian_gives_same_cells():
    east = domain_from_polygon(BOX_180)
    moved = shapely.transform(BOX_180, lambda c: np.column_stack([wrap_lon(c[:, 0] - 180.0),
                                                                   c[:, 1]]))
    west = domain_from_polygon(moved)  # the same box centred on 0°
    g1, g2 = make_grid(east, 5.0), make_grid(west, 5.0)
    assert g1.shape == g2.shape
    np.testing.assert_allclose(g1.area_km2, g2.area_km2, atol=1e-6)
    assert east.lon0 == pytest.approx(180.0) or east.lon0 == pytest.approx(-180.0)


def test_either_longitude_convention(box_domain):
    as360 = shapely.transform(BOX_180, lambda c: np.column_stack([c[:, 0] % 360, c[:, 1]]))
    dom = domain_from_polygon(as360)
    assert dom.area_km2 == pytest.approx(box_domain.area_km2, rel=1e-9)
    assert dom.contains([-179.9, 179.9, 170.0], [61, 61, 61]).tolist() == [True, True, False]


def test_derive_domain_from_frequent_stations():
    casts = synthetic_casts()
    dom = derive_domain(casts["lon"], casts["lat"], casts["year"], casts["station"])
    assert dom.contains(casts["lon"], casts["lat"]).all()
    assert not dom.contains([175.0], [61.0])[0]
    # Order-free: shuffling the casts gives the same polygon.
    sh = casts.sample(frac=1, random_state=3)
    dom2 = derive_domain(sh["lon"], sh["lat"], sh["year"], sh["station"])
    assert dom2.area_km2 == pytest.approx(dom.area_km2, rel=1e-12)


def test_sample_lonlat_grid_handles_0_360_axis():
    lon = np.arange(170.0, 191.0, 1.0)
    lat = np.arange(55.0, 66.0, 1.0)
    values = np.add.outer(lat, lon)
    got = sample_lonlat_grid(lon, lat, values, [-175.5], [60.25])
    assert got[0] == pytest.approx(60.25 + 184.5)
