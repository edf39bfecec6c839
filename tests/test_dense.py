"""Dense surveys and fine grids: local kriging against exact kriging, blocked simulations."""

from __future__ import annotations

from dataclasses import replace
from types import SimpleNamespace

import numpy as np
import pytest
from scipy.special import ndtr

from coldindex import dense
from coldindex.domain import Grid
from coldindex.fitting import fit_variogram
from coldindex.interpolate import Kriging, Variogram
from coldindex.simulation import simulate_summaries


def _survey(n: int, seed: int = 3, nugget: float = 0.05):
    """Casts over a 300 x 300 km box with a smooth field, a depth-like drift and noise."""
    rng = np.random.default_rng(seed)
    xy = rng.uniform(0, 300, (n, 2))
    depth = 0.3 * xy[:, 0] + rng.normal(0, 5, n)
    z = (np.sin(xy[:, 0] / 50) + 0.7 * np.cos(xy[:, 1] / 40) + 0.002 * depth
         + rng.normal(0, np.sqrt(nugget), n))
    return xy, z, depth


def _grid(side: float = 300.0, cell: float = 5.0, hole: bool = True) -> Grid:
    gx = np.arange(cell / 2, side, cell)
    area = np.full((len(gx), len(gx)), cell * cell)
    if hole:
        area[:6, :8] = 0.0  # an inactive corner, as outside a domain
    zero = np.zeros_like(area)
    return Grid(x=gx, y=gx.copy(), cell_km=cell, area_km2=area, lon=zero, lat=zero)


@pytest.mark.parametrize("with_drift", [False, True])
def test_local_kriging_matches_exact_within_the_issue_tolerances(with_drift):
    # Source: exact kriging (coldindex.interpolate.Kriging, dual form) with the same
    # variogram parameters is the reference; tolerances from issue 15 item 3.
    xy, z, depth = _survey(1200, nugget=0.1)
    grid = _grid()
    cells, area = grid.active_xy(), grid.active_area()
    vg = Variogram("exponential", 0.5, 60.0, 0.1)
    drift, d0 = (depth, 0.3 * cells[:, 0]) if with_drift else (None, None)
    exact = Kriging(xy, z, vg, drift)
    local = dense.LocalKriging(xy, z, vg, drift, neighbours=dense.NEIGHBOURS)
    e1, v1, _ = exact.predict(cells, d0)
    e2, v2, _ = local.predict(cells, d0)
    assert v1 is not None and v2 is not None
    assert np.max(np.abs(e1 - e2)) <= 0.01  # °C
    assert np.max(np.abs(np.sqrt(v2) / np.sqrt(v1) - 1)) <= 0.05
    total = area.sum()
    for t in (0.0, 0.5, 1.0):
        a1 = np.sum(area * ndtr((t - e1) / np.sqrt(v1)))
        a2 = np.sum(area * ndtr((t - e2) / np.sqrt(v2)))
        assert abs(a1 - a2) <= 0.005 * total
    err1, var1 = exact.loo()
    err2, var2 = local.loo()
    assert np.max(np.abs(err1 - err2)) <= 0.02
    assert np.max(np.abs(var2 / var1 - 1)) <= 0.05
    # The drift coefficients: Vecchia-whitened GLS over all casts, near the exact GLS.
    assert np.allclose(local.beta, exact.beta, atol=0.05)


def test_local_kriging_with_every_cast_in_the_neighbourhood_is_exact_kriging():
    # Source: with all casts in every neighbourhood and a Vecchia factor that conditions
    # on every earlier cast, simple kriging around the GLS drift equals universal kriging
    # (Cressie 1993, sect. 3.4): estimate and variance agree to rounding.
    xy, z, depth = _survey(28)
    vg = Variogram("spherical", 0.4, 120.0, 0.02)
    cells = np.random.default_rng(1).uniform(0, 300, (500, 2))
    exact = Kriging(xy, z, vg, depth)
    local = dense.LocalKriging(xy, z, vg, depth, neighbours=28)
    e1, v1, _ = exact.predict(cells, 0.3 * cells[:, 0])
    e2, v2, _ = local.predict(cells, 0.3 * cells[:, 0])
    assert v1 is not None and v2 is not None
    assert np.allclose(local.beta, exact.beta, rtol=1e-7, atol=1e-10)
    assert np.allclose(e1, e2, atol=1e-8)
    assert np.allclose(v1, v2, atol=1e-8)


def test_local_kriging_does_not_depend_on_row_order():
    xy, z, _ = _survey(600)
    vg = Variogram("exponential", 0.5, 60.0, 0.05)
    cells = _grid().active_xy()
    perm = np.random.default_rng(7).permutation(len(z))
    a = dense.LocalKriging(xy, z, vg, neighbours=40)
    b = dense.LocalKriging(xy[perm], z[perm], vg, neighbours=40)
    ea, va, _ = a.predict(cells)
    eb, vb, _ = b.predict(cells)
    assert va is not None and vb is not None
    assert np.allclose(ea, eb, atol=1e-10) and np.allclose(va, vb, atol=1e-10)
    la, lb = a.loo()[0], b.loo()[0]
    assert np.allclose(la[perm], lb, atol=1e-10)


def test_stratified_subsample_is_spread_and_order_free():
    xy, _, _ = _survey(5000)
    sub = dense.stratified_subsample(xy, 400)
    assert 0.9 * 400 <= len(sub) <= 400
    perm = np.random.default_rng(2).permutation(len(xy))
    sub_p = dense.stratified_subsample(xy[perm], 400)
    assert {tuple(p) for p in xy[sub]} == {tuple(p) for p in xy[perm][sub_p]}
    # Spread: every 60 km square of the 300 km box holds some of the subsample.
    cells = {tuple(c) for c in np.floor(xy[sub] / 60).astype(int)}
    assert len(cells) == 25


def test_fit_subsample_keeps_close_pairs_and_is_order_free():
    from scipy.spatial import cKDTree

    xy, _, _ = _survey(6000)
    sub = dense.fit_subsample(xy, 600)
    assert 0.85 * 600 <= len(sub) <= 600
    perm = np.random.default_rng(5).permutation(len(xy))
    sub_p = dense.fit_subsample(xy[perm], 600)
    assert {tuple(p) for p in xy[sub]} == {tuple(p) for p in xy[perm][sub_p]}
    # A third of the subsample sits at the survey's own spacing: its nearest-neighbour
    # distances reach down to the survey's, which a stratified subsample alone does not.
    survey_nn = np.median(cKDTree(xy).query(xy, k=2)[0][:, 1])
    nn = cKDTree(xy[sub]).query(xy[sub], k=2)[0][:, 1]
    spread = dense.stratified_subsample(xy, 600)
    nn_spread = cKDTree(xy[spread]).query(xy[spread], k=2)[0][:, 1]
    assert np.mean(nn <= 1.5 * survey_nn) >= 0.25
    assert np.mean(nn_spread <= 1.5 * survey_nn) < 0.05


def test_factory_switches_at_the_threshold_and_the_fit_uses_a_subsample():
    xy, z, _ = _survey(300)
    vg = Variogram("exponential", 0.5, 60.0, 0.05)
    assert isinstance(dense.make_kriging(xy, z, vg, dense_threshold=300), Kriging)
    assert isinstance(dense.make_kriging(xy, z, vg, dense_threshold=299), dense.LocalKriging)
    whole = dense.fit_year(xy, z, "exponential", dense_threshold=300)
    part = dense.fit_year(xy, z, "exponential", dense_threshold=299, subsample=150)
    sub = dense.fit_subsample(xy, 150)
    ref = fit_variogram(xy[sub], z[sub], "exponential")
    assert part.variogram == ref.variogram
    assert whole.variogram != part.variogram


def _sim_options(sims: int = 40, draws: int = 0):
    return SimpleNamespace(sims=sims, param_draws=draws, thresholds=(0.0, 0.5))


@pytest.mark.parametrize("len_km", [8.0, 400.0])
def test_blocked_simulations_equal_the_serial_ones_draw_for_draw(len_km):
    # Source: coldindex.indices.simulate_summaries on the same seed is the reference;
    # 8 km runs the circulant embedding, 400 km the exact fallback on blocks of cells.
    xy, z, _ = _survey(120)
    grid = _grid(200.0)
    cells, area = grid.active_xy(), grid.active_area()
    regions = np.vstack([area * (cells[:, 0] < 100), area * (cells[:, 0] >= 100)])
    fit = fit_variogram(xy, z, "exponential")
    fit = replace(fit, variogram=replace(fit.variogram, len_scale=len_km))
    kr = Kriging(xy, z, fit.variogram)
    opts = _sim_options(30, 3)
    a = simulate_summaries(kr, fit, xy, z, None, grid, cells, area, None, opts,
                           np.random.default_rng(5), regions)
    b = dense.simulate_blocked(kr, fit, xy, z, None, grid, cells, area, None, opts,
                               np.random.default_rng(5), regions)
    assert a.method == b.method
    assert np.allclose(a.means, b.means, atol=1e-10)
    assert np.allclose(a.areas, b.areas, atol=1e-6)
    assert np.allclose(a.region_areas, b.region_areas, atol=1e-6)
    assert np.allclose(a.region_means, b.region_means, atol=1e-10, equal_nan=True)


@pytest.mark.parametrize("with_drift", [False, True])
def test_dense_simulations_match_exact_ones_on_the_same_draws(with_drift):
    # Source: the blocked simulation with exact kriging (equal to the serial path, test
    # above) on the same seed is the reference; the issue asks `_sd` within 5 %.
    xy, z, depth = _survey(900, nugget=0.1)
    grid = _grid(300.0, 6.0)
    cells, area = grid.active_xy(), grid.active_area()
    drift, d0 = (depth, 0.3 * cells[:, 0]) if with_drift else (None, None)
    vg = Variogram("exponential", 0.5, 10.0, 0.1)
    fit = replace(fit_variogram(xy[:200], z[:200], "exponential"), variogram=vg)
    opts = _sim_options(60)
    exact = dense.simulate_blocked(Kriging(xy, z, vg, drift), fit, xy, z, drift, grid, cells,
                                   area, d0, opts, np.random.default_rng(9))
    local = dense.simulate_blocked(dense.LocalKriging(xy, z, vg, drift), fit, xy, z, drift,
                                   grid, cells, area, d0, opts, np.random.default_rng(9))
    assert exact.method == local.method == "circulant"
    assert "local kriging" in local.note
    assert abs(np.std(local.means) / np.std(exact.means) - 1) <= 0.05
    for j in range(2):
        assert abs(np.std(local.areas[:, j]) / np.std(exact.areas[:, j]) - 1) <= 0.05
        assert np.max(np.abs(local.areas[:, j] - exact.areas[:, j])) <= 0.005 * area.sum()


def test_simulate_dispatches_on_size():
    xy, z, _ = _survey(60)
    grid = _grid(100.0)
    cells, area = grid.active_xy(), grid.active_area()
    fit = fit_variogram(xy, z, "exponential")
    fit = replace(fit, variogram=replace(fit.variogram, len_scale=6.0))
    kr = Kriging(xy, z, fit.variogram)
    opts = _sim_options(10)
    serial = dense.simulate(kr, fit, xy, z, None, grid, cells, area, None, opts,
                            np.random.default_rng(1))
    blocked = dense.simulate(kr, fit, xy, z, None, grid, cells, area, None, opts,
                             np.random.default_rng(1), blocked_values=0)
    assert np.allclose(serial.areas, blocked.areas, atol=1e-6)
    assert dense.needs_blocks(kr, len(area), 10, blocked_values=0)
    assert not dense.needs_blocks(kr, len(area), 10)


def test_local_kriging_refuses_what_it_cannot_do():
    xy, z, _ = _survey(50)
    vg = Variogram("exponential", 0.5, 60.0, 0.05)
    with pytest.raises(ValueError, match="neighbours"):
        dense.LocalKriging(xy, z, vg, neighbours=2)
    with pytest.raises(ValueError, match="weight"):
        dense.LocalKriging(xy, z, vg).predict(xy[:3], return_weights=True)


def test_memory_estimate_follows_the_path_the_year_takes():
    # The serial exact path keeps the estimate the pipeline used before: 8 (4n² + nm + (2Y+S)m).
    assert dense.working_memory_bytes(300, 5000, 30, 200) == 8 * (
        4 * 300**2 + 300 * 5000 + (2 * 30 + 200) * 5000)
    # 20,000 casts: local kriging stays far below the 12.8 GB of four exact n x n matrices.
    assert dense.working_memory_bytes(20000, 5537, 1, 200) < 1024**3
    assert dense.working_memory_bytes(20000, 5537, 1, 200, dense_threshold=10**9) > 12e9
    # A fine grid: blocked simulations drop the S x m realizations.
    fine = dense.working_memory_bytes(168, 469847, 36, 200)
    assert fine < 8 * (200 * 469847)


def test_fields_nc_is_written_a_year_at_a_time_with_the_eager_values(tmp_path, box_domain):
    # Source: the values fields_dataset stored before it became lazy: the float32 map and
    # SD placed on the grid, P = Phi((T - m) / s) from those float32 values.
    import pandas as pd
    import xarray as xr

    from coldindex.domain import make_grid
    from coldindex.io.writers import fields_dataset, write_netcdf

    grid = make_grid(box_domain, 10.0)
    m = int(grid.mask.sum())
    rng = np.random.default_rng(4)
    est = rng.normal(1.0, 1.0, (3, m))
    sd = np.abs(rng.normal(0.3, 0.1, (3, m)))
    est[1] = np.nan  # a year without indices
    sd[1] = np.nan
    casts = pd.DataFrame({"year": [2001, 2003], "lat": [61.0, 61.2], "lon": [180.0, 180.1],
                          "bottom_c": [0.0, 0.5], "date": ["2001-07-01", "2003-07-02"]})
    ds = fields_dataset([2001, 2002, 2003], est, sd, [0.0, 1.5], grid, box_domain, casts)
    write_netcdf(ds, tmp_path / "a.nc")
    write_netcdf(fields_dataset([2001, 2002, 2003], est, sd, [0.0, 1.5], grid, box_domain,
                                casts), tmp_path / "b.nc")
    assert (tmp_path / "a.nc").read_bytes() == (tmp_path / "b.nc").read_bytes()
    e32 = grid.to_2d(est).astype("float32")
    s32 = grid.to_2d(sd).astype("float32")
    with np.errstate(divide="ignore", invalid="ignore"):
        p = ndtr((1.5 - e32.astype(float)) / s32.astype(float)).astype("float32")
    with xr.open_dataset(tmp_path / "a.nc") as f:
        assert f["bottom_temperature"].encoding["chunksizes"] == (1, *grid.shape)
        assert np.array_equal(f["bottom_temperature"].values, e32, equal_nan=True)
        assert np.array_equal(f["bottom_temperature_sd"].values, s32, equal_nan=True)
        assert np.array_equal(f["p_below_1p5c"].values, p, equal_nan=True)
        assert f["p_below_0c"].attrs["grid_mapping"] == "albers_conical_equal_area"
        assert np.isnan(f["bottom_temperature"].values[1]).all()
