"""Gridded ice to monthly regional series: cell areas, area/extent/volume/mass, grids."""

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pyproj
import pytest
import xarray as xr
from hypothesis import given, settings
from hypothesis import strategies as st
from shapely.geometry import Polygon

from coldindex.config import IceFieldsOptions
from coldindex.domain import domain_from_polygon
from coldindex.errors import InputError
from coldindex.icefields import (
    lonlat_cell_areas_km2,
    lonlat_grid_cells,
    monthly_table,
    polygon_areas_km2,
    projected_grid_cells,
    region_weights,
    regional_sums,
)
from coldindex.io.icefields import open_ice_fields, read_regions
from coldindex.sources import ice_table

GEOD = pyproj.Geod(ellps="WGS84")


def _geodesic_area_km2(geom) -> float:
    """Area of a lon/lat polygon on WGS 84, its edges densified (they follow parallels)."""
    import shapely

    dense = shapely.segmentize(geom, 0.01)
    area, _ = GEOD.geometry_area_perimeter(dense)
    return abs(area) / 1e6


def _v(ds: xr.Dataset, q: str) -> float:
    return float(np.asarray(ds[q].values).item())


def test_lonlat_cell_areas_match_pyproj_geod():
    lon_e = np.array([10.0, 10.25, 10.5])
    lat_e = np.array([-70.0, -69.9, -69.8, 45.0, 45.1])
    ours = lonlat_cell_areas_km2(lon_e, lat_e)
    for j in (0, 1, 3):
        for i in range(2):
            lo = [lon_e[i], lon_e[i + 1], lon_e[i + 1], lon_e[i]]
            la = [lat_e[j], lat_e[j], lat_e[j + 1], lat_e[j + 1]]
            # Source: pyproj.Geod.polygon_area_perimeter (Karney 2013), WGS 84
            ref = abs(GEOD.polygon_area_perimeter(lo, la)[0]) / 1e6
            assert ours[j, i] == pytest.approx(ref, rel=1e-5)
    # the whole ellipsoid: 4 pi R_authalic^2
    globe = lonlat_cell_areas_km2([-180.0, 180.0], [-90.0, 90.0])
    assert globe[0, 0] == pytest.approx(510065621.724, rel=1e-9)  # From memory: WGS 84 area


def _lonlat_field(lon, lat, conc, thick=None):
    c = xr.DataArray(np.broadcast_to(conc, (1, len(lat), len(lon))).copy(),
                     dims=("time", "lat", "lon"))
    h = None if thick is None else xr.DataArray(
        np.broadcast_to(thick, (1, len(lat), len(lon))).copy(), dims=("time", "lat", "lon"))
    return c, h


def _region_box():
    # 176 E to 176 W across 180 degrees, 63 S to 61 S, written with both conventions
    return Polygon([(176.0, -63.0), (184.0, -63.0), (184.0, -61.0), (176.0, -61.0)])


def test_uniform_field_over_a_known_polygon_gives_area_extent_volume_and_mass():
    geom = _region_box()
    truth = _geodesic_area_km2(geom)
    dom = domain_from_polygon(geom)
    lon = np.arange(170.125, 190.0, 0.25)  # 0..360 convention across 180 degrees
    lat = np.arange(-65.875, -58.0, 0.25)
    cells = lonlat_grid_cells(lon, lat)
    w = region_weights(cells, {"box": dom})
    assert w[0].area_km2 == pytest.approx(truth, rel=2e-4)
    c, h = _lonlat_field(lon, lat, 0.6, 1.5)
    sums = regional_sums(c, h, w, floe_thickness=True, extent_threshold=0.15,
                         density_kg_m3=917.0).compute()
    assert _v(sums, "area_km2") == pytest.approx(0.6 * truth, rel=2e-4)
    assert _v(sums, "extent_km2") == pytest.approx(truth, rel=2e-4)
    vol = 0.6 * 1.5 * truth * 1e-3  # km2 x m -> km3
    assert _v(sums, "volume_km3") == pytest.approx(vol, rel=2e-4)
    assert _v(sums, "mass_gt") == pytest.approx(vol * 0.917, rel=2e-4)
    # a cell-mean thickness (area: mean where sea) is not multiplied by the concentration
    cell = regional_sums(c, h, w, floe_thickness=False).compute()
    assert _v(cell, "volume_km3") == pytest.approx(1.5 * truth * 1e-3, rel=2e-4)
    # below the extent threshold: area counts, extent does not
    c2, _ = _lonlat_field(lon, lat, 0.1)
    low = regional_sums(c2, None, w, floe_thickness=True).compute()
    assert _v(low, "extent_km2") == 0.0
    assert _v(low, "area_km2") == pytest.approx(0.1 * truth, rel=2e-4)
    assert "volume_km3" not in low


def test_field_across_180_same_in_both_longitude_conventions():
    dom = domain_from_polygon(_region_box())
    lat = np.arange(-65.875, -58.0, 0.25)
    rng = np.random.default_rng(3)
    lon360 = np.arange(170.125, 190.0, 0.25)
    conc = rng.uniform(0, 1, (1, len(lat), len(lon360)))
    a = regional_sums(xr.DataArray(conc, dims=("time", "y", "x")), None,
                      region_weights(lonlat_grid_cells(lon360, lat), {"r": dom}),
                      floe_thickness=True).compute()
    lon180 = (lon360 + 180.0) % 360.0 - 180.0  # jumps from 179.875 to -179.875
    b = regional_sums(xr.DataArray(conc, dims=("time", "y", "x")), None,
                      region_weights(lonlat_grid_cells(lon180, lat), {"r": dom}),
                      floe_thickness=True).compute()
    assert _v(a, "area_km2") == pytest.approx(_v(b, "area_km2"), rel=1e-9)


def test_polar_stereographic_grid_gives_the_area_of_its_lonlat_twin():
    geom = _region_box()
    dom = domain_from_polygon(geom)
    truth = _geodesic_area_km2(geom)
    crs = pyproj.CRS.from_cf({"grid_mapping_name": "polar_stereographic",
                              "straight_vertical_longitude_from_pole": 0.0,
                              "latitude_of_projection_origin": -90.0,
                              "standard_parallel": -70.0, "false_easting": 0.0,
                              "false_northing": 0.0, "semi_major_axis": 6378137.0,
                              "inverse_flattening": 298.257223563})
    fwd = pyproj.Transformer.from_crs(crs.geodetic_crs, crs, always_xy=True)
    px, py = fwd.transform([176.0, 184.0, 184.0, 176.0], [-63.0, -63.0, -61.0, -61.0])
    x = np.arange(min(px) - 50e3, max(px) + 50e3, 10e3)
    y = np.arange(min(py) - 50e3, max(py) + 50e3, 10e3)
    cells = projected_grid_cells(x, y, crs)
    w = region_weights(cells, {"r": dom})
    conc = xr.DataArray(np.full((1, len(y), len(x)), 0.7), dims=("time", "y", "x"))
    stereo = _v(regional_sums(conc, None, w, floe_thickness=True).compute(), "area_km2")
    lon = np.arange(170.125, 190.0, 0.25)
    lat = np.arange(-65.875, -58.0, 0.25)
    twin = regional_sums(*_lonlat_field(lon, lat, 0.7), region_weights(
        lonlat_grid_cells(lon, lat), {"r": dom}), floe_thickness=True).compute()
    assert stereo == pytest.approx(_v(twin, "area_km2"), rel=1e-3)
    assert stereo == pytest.approx(0.7 * truth, rel=1e-3)
    # its cell areas are geodesic polygons, not the nominal 10 km x 10 km
    some = polygon_areas_km2(cells.vert_lon[:2, 0], cells.vert_lat[:2, 0])
    assert not np.allclose(some, 100.0, rtol=1e-3)


def test_monthly_table_averages_days_into_months():
    sums = xr.Dataset({"area_km2": (("time", "region"), np.array([[1.0], [3.0], [10.0]]))},
                      coords={"region": ["r"]})
    t = monthly_table(sums, [2020, 2020, 2020], [1, 1, 2])
    assert t["value"].tolist() == [2.0, 10.0]
    assert t["n_times"].tolist() == [2, 1]
    assert list(t.columns) == ["year", "month", "region", "quantity", "value", "n_times"]


# -- files ----------------------------------------------------------------------------------

def _write_daily(path: Path, days: pd.DatetimeIndex, percent: bool, thickness: bool = True,
                 cell_methods: str = "area: mean where sea_ice") -> None:
    lon = np.arange(170.125, 190.0, 0.5)
    lat = np.arange(-65.875, -58.0, 0.5)
    daily = np.clip(0.2 + 0.003 * (days.day_of_year.to_numpy() - 122), 0, 1)
    frac = daily[:, None, None] * np.ones((len(days), len(lat), len(lon)))
    data = {"siconc": (("time", "lat", "lon"), (frac * 100 if percent else frac).astype("f4"),
                       {"standard_name": "sea_ice_area_fraction",
                        "units": "%" if percent else "1"})}
    if thickness:
        data["sithick"] = (("time", "lat", "lon"), np.full(frac.shape, 0.8, "f4"),
                           {"standard_name": "sea_ice_thickness", "units": "m",
                            "cell_methods": cell_methods})
    ds = xr.Dataset(data, coords={
        "time": ("time", days), "lat": ("lat", lat, {"standard_name": "latitude",
                                                     "units": "degrees_north"}),
        "lon": ("lon", lon, {"standard_name": "longitude", "units": "degrees_east"})},
        attrs={"Conventions": "CF-1.8"})
    ds.to_netcdf(path)


def _regions(path: Path) -> Path:
    ring = [[176.0, -63.0], [-176.0, -63.0], [-176.0, -61.0], [176.0, -61.0], [176.0, -63.0]]
    path.write_text(json.dumps({"type": "FeatureCollection", "features": [
        {"type": "Feature", "properties": {"name": "shelf"},
         "geometry": {"type": "Polygon", "coordinates": [ring]}}]}))
    return path


def test_files_in_percent_and_fraction_agree_and_daily_fields_become_months(tmp_path: Path):
    days = pd.date_range("2020-05-01", "2020-06-30", freq="D")
    _write_daily(tmp_path / "pct.nc", days, percent=True)
    _write_daily(tmp_path / "frac.nc", days, percent=False)
    regions = read_regions(_regions(tmp_path / "r.geojson"))
    a = ice_table([tmp_path / "pct.nc"], regions, IceFieldsOptions()).table
    b = ice_table([tmp_path / "frac.nc"], regions, IceFieldsOptions()).table
    pd.testing.assert_frame_equal(a, b, rtol=1e-6)
    area = a[a["quantity"] == "area_km2"]
    assert area["month"].tolist() == [5, 6] and area["n_times"].tolist() == [31, 30]
    truth = _geodesic_area_km2(_region_box())
    may = np.clip(0.2 + 0.003 * (days.day_of_year.to_numpy()[:31] - 122), 0, 1).astype("f4").mean()
    assert area["value"].iloc[0] == pytest.approx(may * truth, rel=5e-4)
    assert set(a["quantity"]) == {"area_km2", "extent_km2", "volume_km3", "mass_gt"}


def test_two_files_split_in_time_give_the_same_table_as_one(tmp_path: Path):
    days = pd.date_range("2020-05-01", "2020-06-30", freq="D")
    _write_daily(tmp_path / "all.nc", days, percent=False)
    _write_daily(tmp_path / "a.nc", days[:45], percent=False)
    _write_daily(tmp_path / "b.nc", days[45:], percent=False)
    regions = read_regions(_regions(tmp_path / "r.geojson"))
    one = ice_table([tmp_path / "all.nc"], regions, IceFieldsOptions()).table
    two = ice_table([tmp_path / "b.nc", tmp_path / "a.nc"], regions, IceFieldsOptions()).table
    pd.testing.assert_frame_equal(one, two, rtol=1e-9)


def test_thickness_without_cell_methods_is_refused_until_told(tmp_path: Path):
    days = pd.date_range("2020-05-01", periods=3, freq="D")
    _write_daily(tmp_path / "x.nc", days, percent=False, cell_methods="")
    with pytest.raises(InputError, match="ice_fields.thickness"):
        open_ice_fields(tmp_path / "x.nc")
    f = open_ice_fields(tmp_path / "x.nc", "cell")
    assert not f.floe_thickness
    f.close()
    _write_daily(tmp_path / "y.nc", days, percent=False, cell_methods="area: mean where sea")
    g = open_ice_fields(tmp_path / "y.nc")
    assert not g.floe_thickness
    g.close()


def test_concentration_without_units_is_refused(tmp_path: Path):
    days = pd.date_range("2020-05-01", periods=2, freq="D")
    _write_daily(tmp_path / "x.nc", days, percent=False, thickness=False)
    ds = xr.open_dataset(tmp_path / "x.nc").load()
    del ds["siconc"].attrs["units"]
    ds.to_netcdf(tmp_path / "y.nc")
    with pytest.raises(InputError, match="units"):
        open_ice_fields(tmp_path / "y.nc")


# -- the command line ----------------------------------------------------------------------

def test_ice_command_writes_the_tidy_table_and_its_record(tmp_path: Path):
    from typer.testing import CliRunner

    from coldindex.cli import app
    from tests.conftest import SAMPLE

    out = tmp_path / "ice"
    result = CliRunner().invoke(app, ["ice", str(SAMPLE / "ice_fields.nc"), "--regions",
                                      str(SAMPLE / "domain.geojson"), "--out", str(out)])
    assert result.exit_code == 0, result.output
    table = pd.read_csv(out / "ice_fields.csv")
    assert list(table.columns) == ["year", "month", "region", "quantity", "value", "n_times"]
    record = json.loads((out / "ice_fields.json").read_text())
    area = next(iter(record["regions"].values()))  # named by the feature's name
    assert area["area_km2"] == pytest.approx(area["region_polygon_km2"], rel=1e-3)
    assert record["thickness"].startswith("floe thickness")


def test_ice_command_refuses_a_field_without_units_and_writes_nothing(tmp_path: Path):
    from typer.testing import CliRunner

    from coldindex.cli import app

    days = pd.date_range("2020-05-01", periods=2, freq="D")
    _write_daily(tmp_path / "x.nc", days, percent=False, thickness=False)
    ds = xr.open_dataset(tmp_path / "x.nc").load()
    del ds["siconc"].attrs["units"]
    ds.to_netcdf(tmp_path / "y.nc")
    out = tmp_path / "out"
    result = CliRunner().invoke(app, ["ice", str(tmp_path / "y.nc"), "--regions",
                                      str(_regions(tmp_path / "r.geojson")), "--out", str(out)])
    assert result.exit_code == 2
    assert "units" in result.output and "Traceback" not in result.output
    assert not (out / "ice_fields.csv").exists()


def test_curvilinear_file_with_2d_lat_lon_gives_the_area_of_its_1d_twin(tmp_path: Path):
    lon = np.arange(170.125, 190.0, 0.25)
    lat = np.arange(-65.875, -58.0, 0.25)
    LO, LA = np.meshgrid(lon, lat)
    days = pd.date_range("2020-07-01", periods=2, freq="D")
    ds = xr.Dataset(
        {"siconc": (("time", "j", "i"), np.full((2, len(lat), len(lon)), 0.5),
                    {"standard_name": "sea_ice_area_fraction", "units": "1"})},
        coords={"time": days,
                "nav_lat": (("j", "i"), LA, {"standard_name": "latitude",
                                              "units": "degrees_north"}),
                "nav_lon": (("j", "i"), (LO + 180.0) % 360.0 - 180.0,
                            {"standard_name": "longitude", "units": "degrees_east"})})
    ds.to_netcdf(tmp_path / "curv.nc")
    regions = read_regions(_regions(tmp_path / "r.geojson"))
    curv = ice_table([tmp_path / "curv.nc"], regions, IceFieldsOptions()).table
    area = curv[curv["quantity"] == "area_km2"]["value"].iloc[0]
    truth = _geodesic_area_km2(_region_box())
    assert area == pytest.approx(0.5 * truth, rel=1e-3)


def test_series_for_skill_picks_quantity_and_region():
    from coldindex.errors import ConfigError
    from coldindex.icefields import series_for_skill

    t = pd.DataFrame({"year": [2020, 2020, 2020], "month": [5, 5, 6],
                      "region": ["a", "b", "a"], "quantity": ["area_km2"] * 3,
                      "value": [1.0, 2.0, 3.0], "n_times": [1, 1, 1]})
    s = series_for_skill(t, "area_km2", "a")
    assert s["ice"].tolist() == [1.0, 3.0] and list(s.columns) == ["year", "month", "ice"]
    with pytest.raises(ConfigError, match="ice_fields.region"):
        series_for_skill(t, "area_km2", "")
    with pytest.raises(ConfigError, match="ice_fields.quantity"):
        series_for_skill(t, "mass_gt", "a")


def test_skill_command_reads_the_tidy_ice_table(tmp_path: Path):
    from typer.testing import CliRunner

    from coldindex.cli import app
    from coldindex.demo import make_scenario
    from tests.conftest import SAMPLE

    runner = CliRunner()
    ice_out = tmp_path / "ice"
    r = runner.invoke(app, ["ice", str(SAMPLE / "ice_fields.nc"), "--regions",
                            str(SAMPLE / "domain.geojson"), "--out", str(ice_out)])
    assert r.exit_code == 0, r.output
    winter = make_scenario().winter_anomaly  # the anomaly that drove each survey
    noise = np.random.default_rng(2).normal(0, 0.3, len(winter))
    target = pd.DataFrame({"year": list(winter), "bottom_mean_c":
                           [-1.5 * w + e for w, e in zip(winter.values(), noise, strict=True)]})
    target = target[(target["year"] >= 1991) & (target["year"] <= 2026)]
    target.to_csv(tmp_path / "target.csv", index=False)
    args = ["skill", "--ice", str(ice_out / "ice_fields.csv"), "--target",
            str(tmp_path / "target.csv"), "--value", "bottom_mean_c", "--months", "5-10",
            "--survey-month", "1", "--lags", "0-1", "--out", str(tmp_path / "skill")]
    r = runner.invoke(app, [*args, "--ice-quantity", "volume_km3"])
    assert r.exit_code == 0, r.output
    skill = pd.read_csv(tmp_path / "skill" / "skill.csv")
    lag0 = skill[(skill["lag"] == 0) & (skill["predictor"] == "ice_winter_mean")]
    assert lag0["r"].iloc[0] < -0.6
    bad = runner.invoke(app, [*args, "--ice-quantity", "depth_m"])
    assert bad.exit_code == 2 and "--ice-quantity" in bad.output


def test_percent_labelled_as_fraction_is_refused(tmp_path: Path):
    days = pd.date_range("2020-05-01", periods=2, freq="D")
    _write_daily(tmp_path / "x.nc", days, percent=True, thickness=False)
    ds = xr.open_dataset(tmp_path / "x.nc").load()
    ds["siconc"].attrs["units"] = "1"
    ds.to_netcdf(tmp_path / "y.nc")
    with pytest.raises(InputError, match="like percent"):
        open_ice_fields(tmp_path / "y.nc")


def test_ice_settings_are_validated_with_their_key():
    from coldindex.errors import ConfigError

    with pytest.raises(ConfigError, match="ice_fields.extent_threshold"):
        IceFieldsOptions(extent_threshold=15.0)
    with pytest.raises(ConfigError, match="ice_fields.quantity"):
        IceFieldsOptions(quantity="mass_kg")
    with pytest.raises(ConfigError, match="ice_fields.thickness"):
        IceFieldsOptions(thickness="mean")


def test_overlapping_files_are_refused(tmp_path: Path):
    days = pd.date_range("2020-05-01", "2020-05-20", freq="D")
    _write_daily(tmp_path / "a.nc", days[:12], percent=False)
    _write_daily(tmp_path / "b.nc", days[10:], percent=False)
    regions = read_regions(_regions(tmp_path / "r.geojson"))
    with pytest.raises(InputError, match="both hold the time step"):
        ice_table([tmp_path / "a.nc", tmp_path / "b.nc"], regions, IceFieldsOptions())


@settings(max_examples=12, deadline=None)
@given(shift=st.floats(-180.0, 180.0), seed=st.integers(0, 1000))
def test_a_field_and_region_moved_in_longitude_give_the_same_sums(shift: float, seed: int):
    rng = np.random.default_rng(seed)
    lat = np.arange(-65.875, -58.0, 0.25)
    base_lon = np.arange(170.125, 190.0, 0.25)
    conc = rng.uniform(0.0, 1.0, (1, len(lat), len(base_lon)))
    field = xr.DataArray(conc, dims=("time", "y", "x"))
    out = []
    for s in (0.0, shift):
        ring = [(176.0 + s, -63.0), (184.0 + s, -63.0), (184.0 + s, -61.0), (176.0 + s, -61.0)]
        poly = Polygon([((x + 180.0) % 360.0 - 180.0, y) for x, y in ring])
        dom = domain_from_polygon(poly)
        w = region_weights(lonlat_grid_cells((base_lon + s + 180.0) % 360.0 - 180.0, lat),
                           {"r": dom})
        sums = regional_sums(field, None, w, floe_thickness=True).compute()
        out.append((_v(sums, "area_km2"), _v(sums, "extent_km2")))
    assert out[1][0] == pytest.approx(out[0][0], rel=1e-6)
    assert out[1][1] == pytest.approx(out[0][1], rel=1e-6)
    assert out[0][0] <= out[0][1] + 0.15 * w[0].area_km2  # area <= extent + threshold share
