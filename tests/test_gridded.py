from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from typer.testing import CliRunner

from coldindex.cli import app
from coldindex.domain import make_grid
from coldindex.errors import InputError
from coldindex.gridded import adjust_cells, trajectories_from_netcdf
from coldindex.io.writers import fields_dataset, write_json, write_netcdf

YEARS_OBS = np.arange(2001, 2009)


def truth(lat, year, month, offset):
    """Analytic model temperature [degC]: linear in latitude, so bilinear is exact."""
    return 2.0 * (lat - 61.0) + 0.05 * (year - 2001) + np.cos(2 * np.pi * (month - 7) / 12) \
        + offset


@pytest.fixture(scope="module")
def files(tmp_path_factory, box_domain):
    d = tmp_path_factory.mktemp("gridded")
    grid = make_grid(box_domain, 10.0)
    lat = grid.lat[grid.mask]
    obs = np.array([2.0 * (lat - 61.0) + 0.3 + 0.02 * (y - 2001) for y in YEARS_OBS])
    casts = pd.DataFrame({"year": [2001], "lat": [61.0], "lon": [180.0], "bottom_c": [0.0]})
    ds = fields_dataset(list(YEARS_OBS), obs, np.full_like(obs, 0.1), [0.0], grid, box_domain,
                        casts)
    write_netcdf(ds, d / "fields.nc")
    write_json(box_domain.to_geojson(), d / "domain.geojson")
    time = pd.date_range("2001-01-15", "2030-12-15", freq="MS") + pd.Timedelta(days=14)
    mlat = np.arange(59.0, 63.01, 0.25)
    mlon = np.arange(176.0, 184.01, 0.5)  # 0..360 convention across 180
    yy, mm = time.year.to_numpy(), time.month.to_numpy()
    data = np.stack([truth(mlat[None, :, None], yy[:, None, None], mm[:, None, None], off)
                     * np.ones((1, 1, len(mlon))) + 273.15 for off in (0.0, 1.0)])
    model = xr.Dataset({"tob": (("model", "time", "lat", "lon"), data.astype("float32"),
                                {"units": "K"})},
                       coords={"model": ["A", "B"], "time": time, "lat": mlat, "lon": mlon},
                       attrs={"scenario": "high"})
    model.to_netcdf(d / "model.nc")
    return d, grid


def test_gridded_mean_matches_analytic_truth(files):
    d, grid = files
    tr = trajectories_from_netcdf([d / "model.nc"], d / "fields.nc", "bottom_mean_c", "tob",
                                  "6-8", "none", None)
    assert set(tr["model"]) == {"A", "B"} and set(tr["scenario"]) == {"high"}
    area = grid.area_km2[grid.mask]
    lat = grid.lat[grid.mask]
    season = np.mean([np.cos(2 * np.pi * (m - 7) / 12) for m in (6, 7, 8)])
    for model, off in (("A", 0.0), ("B", 1.0)):
        g = tr[tr["model"] == model].set_index("year")["value"]
        for y in (2001, 2015, 2030):
            expect = np.sum(area * (2.0 * (lat - 61.0))) / area.sum() + 0.05 * (y - 2001) \
                + season + off
            assert g[y] == pytest.approx(expect, abs=1e-4)  # float32 storage


def test_delta_per_cell_matches_observed_calibration(files):
    d, _ = files
    tr = trajectories_from_netcdf([d / "model.nc"], d / "fields.nc", "bottom_mean_c", "tob",
                                  "6-8", "delta", (2001, 2008))
    with xr.open_dataset(d / "fields.nc") as ds:
        obs_mean = np.nanmean(
            [np.nansum(ds["bottom_temperature"].values[k] * ds["cell_area"].values)
             / np.nansum(ds["cell_area"].values) for k in range(len(YEARS_OBS))])
    cal = tr[(tr["year"] <= 2008)].groupby("model")["value"].mean()
    np.testing.assert_allclose(cal.to_numpy(), obs_mean, atol=1e-4)


def test_area_column_and_adjust_cells_refuses_qdm(files):
    d, _ = files
    tr = trajectories_from_netcdf([d / "model.nc"], d / "fields.nc", "below_0c_km2", "tob",
                                  "6-8", "none", None)
    assert (tr["value"] >= 0).all()
    with pytest.raises(InputError, match="not available on the gridded path"):
        adjust_cells(np.zeros((10, 3)), np.arange(2001, 2011), np.zeros((10, 3)),
                     np.arange(2001, 2011), "qdm", (2001, 2010))


def test_qmap_per_cell_returns_its_own_calibration_fields():
    # One quantile definition on the gridded path too: fields adjusted against themselves over
    # the calibration years are unchanged, cell by cell (the old mix of plotting positions
    # pulled every cell's extremes towards its median).
    rng = np.random.default_rng(4)
    years = np.arange(2001, 2031)
    fields = rng.normal(0.0, 1.0, (len(years), 6)) + np.linspace(-1, 1, 6)
    got = adjust_cells(fields, years, fields, years, "qmap", (2001, 2030))
    np.testing.assert_allclose(got, fields, atol=1e-12)
    obs = rng.gamma(2.0, 1.0, (len(years), 6))
    got = adjust_cells(fields, years, obs, years, "qmap", (2001, 2030))
    np.testing.assert_allclose(np.sort(got, axis=0), np.sort(obs, axis=0), atol=1e-12)


def test_missing_variable_is_named(files):
    d, _ = files
    with pytest.raises(InputError, match="variables present: tob"):
        trajectories_from_netcdf([d / "model.nc"], d / "fields.nc", "bottom_mean_c", "thetao",
                                 "6-8", "none", None)


def test_distributed_equals_local(files):
    from distributed import LocalCluster

    d, _ = files
    local = trajectories_from_netcdf([d / "model.nc"], d / "fields.nc", "bottom_mean_c", "tob",
                                     "6-8", "delta", (2001, 2008))
    with LocalCluster(n_workers=1, threads_per_worker=1, processes=True,
                      dashboard_address=None) as cluster:
        dist = trajectories_from_netcdf([d / "model.nc"], d / "fields.nc", "bottom_mean_c",
                                        "tob", "6-8", "delta", (2001, 2008),
                                        scheduler=cluster.scheduler_address)
    pd.testing.assert_frame_equal(local, dist)


def test_gridded_cli_equals_csv_path(files, tmp_path: Path):
    d, _ = files
    obs = tmp_path / "obs.csv"
    pd.DataFrame({"year": YEARS_OBS, "bottom_mean_c": 0.3 + 0.02 * (YEARS_OBS - 2001)}).to_csv(
        obs, index=False)
    runner = CliRunner()
    args = ["project", str(d / "model.nc"), "--observed", str(obs), "--value", "bottom_mean_c",
            "--fields", str(d / "fields.nc"), "--var", "tob", "--adjust", "delta"]
    # The per-cell adjustment rests on 8 shared years: refused unless explicitly accepted.
    r0 = runner.invoke(app, [*args, "--out", str(tmp_path / "short")])
    assert r0.exit_code == 2 and "overlap in 8 years" in " ".join(r0.output.split())
    r1 = runner.invoke(app, [*args, "--out", str(tmp_path / "g"), "--calibration", "2001-2008",
                             "--short-calibration"])
    assert r1.exit_code == 0, r1.output
    em = pd.read_csv(tmp_path / "g" / "emergence.csv")
    assert em["short_calibration"].all() and (em["calibration_years"] == 8).all()
    tr = trajectories_from_netcdf([d / "model.nc"], d / "fields.nc", "bottom_mean_c", "tob",
                                  "6-8", "delta", None)
    csv = tmp_path / "traj.csv"
    tr.to_csv(csv, index=False)
    r2 = runner.invoke(app, ["project", str(csv), "--observed", str(obs), "--value",
                             "bottom_mean_c", "--out", str(tmp_path / "c"), "--adjust", "none"])
    assert r2.exit_code == 0, r2.output
    a = pd.read_csv(tmp_path / "g" / "projection.csv")
    b = pd.read_csv(tmp_path / "c" / "projection.csv")
    pd.testing.assert_frame_equal(a, b)


def test_curvilinear_grid_units_and_errors(files, tmp_path: Path):
    d, _ = files
    # A 2-D lat/lon (curvilinear) model grid in degC, one model per file, monthly.
    time = pd.date_range("2001-01-15", "2012-12-15", freq="MS") + pd.Timedelta(days=14)
    jj, ii = np.meshgrid(np.arange(17), np.arange(15), indexing="ij")
    lat2 = 59.0 + 0.25 * jj + 0.01 * ii
    lon2 = 176.0 + 0.6 * ii
    yy, mm = time.year.to_numpy(), time.month.to_numpy()
    data = truth(lat2[None], yy[:, None, None], mm[:, None, None], 0.0)
    ds = xr.Dataset({"tob": (("time", "j", "i"), data, {"units": "degC"})},
                    coords={"time": time, "nav_lat": (("j", "i"), lat2),
                            "nav_lon": (("j", "i"), lon2)},
                    attrs={"model": "Curvy", "scenario": "low"})
    path = tmp_path / "curvy.nc"
    ds.to_netcdf(path)
    tr = trajectories_from_netcdf([path], d / "fields.nc", "bottom_mean_c", None, "6-8",
                                  "qmap", (2001, 2008))
    assert set(tr["model"]) == {"Curvy"} and len(tr) == 12
    bad = ds.assign(tob=ds["tob"].assign_attrs(units="furlongs"))
    bad.to_netcdf(tmp_path / "bad_units.nc")
    with pytest.raises(InputError, match="expected degC or K"):
        trajectories_from_netcdf([tmp_path / "bad_units.nc"], d / "fields.nc", "bottom_mean_c",
                                 None, "6-8", "none", None)
    two = ds.assign(other=ds["tob"] * 2)
    two.to_netcdf(tmp_path / "two.nc")
    with pytest.raises(InputError, match="name the bottom-temperature variable"):
        trajectories_from_netcdf([tmp_path / "two.nc"], d / "fields.nc", "bottom_mean_c",
                                 None, "6-8", "none", None)
    with pytest.raises(InputError, match="computes bottom_mean_c or below"):
        trajectories_from_netcdf([path], d / "fields.nc", "cv_rmse_c", None, "6-8", "none",
                                 None)
    far = ds.assign_coords(nav_lon=ds["nav_lon"] - 40.0)
    far.to_netcdf(tmp_path / "far.nc")
    with pytest.raises(InputError, match="does not cover every survey cell"):
        trajectories_from_netcdf([tmp_path / "far.nc"], d / "fields.nc", "bottom_mean_c", None,
                                 "6-8", "none", None)
    with pytest.raises(InputError, match="does not exist"):
        trajectories_from_netcdf([tmp_path / "nope.nc"], d / "fields.nc", "bottom_mean_c",
                                 None, "6-8", "none", None)
    with pytest.raises(InputError, match="not a coldindex fields.nc"):
        trajectories_from_netcdf([path], path, "bottom_mean_c", None, "6-8", "none", None)
