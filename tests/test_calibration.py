"""A fast calibration check of the areas' intervals: synthetic years with a known truth.

The same machinery as ``benchmarks/calibration_areas.py`` (which runs 300 years per
scenario); here few years, a coarse grid and fewer simulations, with bands several Monte
Carlo standard errors wide. A negative control shows the check can fail: the least-squares
fit that weighted bins by the *square* of their pair counts (the old behaviour) is caught.
"""

import numpy as np
import pytest
from shapely.geometry import Polygon

from coldindex import fitting
from coldindex.config import IndexOptions
from coldindex.domain import domain_from_polygon, make_grid
from coldindex.interpolate import Variogram
from coldindex.synthetic import Scenario, calibration_table, run_scenario

BOX = Polygon([(177.5, -63.0), (-177.5, -63.0), (-177.5, -61.0), (177.5, -61.0)])
COLUMNS = ["bottom_mean_c", "below_0c_km2", "below_1c_km2", "below_2c_km2"]
YEARS = 60
# Truth by construction: exponential field, length 40 km, sill 1, nugget 5 % of the sill.
SCENARIO = Scenario(Variogram("exponential", 1.0, 40.0, 0.05), n_casts=150)


@pytest.fixture(scope="module")
def setting():
    domain = domain_from_polygon(BOX)
    return domain, make_grid(domain, 20.0)


def run(setting, fit):
    domain, grid = setting
    opts = IndexOptions(thresholds=(0.0, 1.0, 2.0), grid_km=20.0, sims=100, param_draws=10,
                        min_casts=20, min_coverage=0.0, variogram="exponential", fit=fit)
    res, truth = run_scenario(domain, grid, SCENARIO, YEARS, opts, seed=42)
    return calibration_table(res, truth, COLUMNS).set_index("column")


def calibrated(tab) -> bool:
    # 90 % coverage: with 60 years the Monte Carlo SE is 3.9 points; 0.78 is 3 SE below.
    # RMSE / RMS(sd) near 1; 0.7..1.35 allows for 60 years' sampling noise.
    return bool((tab["coverage90"] >= 0.78).all() and
                tab["rmse_over_sd"].between(0.7, 1.35).all())


def test_likelihood_fit_gives_calibrated_intervals(setting):
    tab = run(setting, "reml")
    assert calibrated(tab), tab


def _old_wls(xy, values, family, drift=None, posterior=False):
    """The former fit: pair counts passed as GSTools weights, i.e. bins weighted by N_h^2."""
    import gstools as gs

    xy = np.asarray(xy, float)
    resid = fitting.drift_residuals(values, drift)
    var = float(np.var(resid))
    spacing, diag = fitting._spacing_and_diagonal(xy)
    max_lag = max(0.5 * diag, 3.0 * spacing)
    c, g, n = gs.vario_estimate((xy[:, 0], xy[:, 1]), resid, np.linspace(0, max_lag, 13),
                                return_counts=True)
    use = n > 0
    model = gs.Exponential(dim=2)
    model.var_bounds = [1e-6 * var, 5.0 * var]
    model.len_scale_bounds = [0.5 * spacing, 3.0 * max_lag]
    model.nugget_bounds = [0.0, 2.0 * var]
    model.fit_variogram(c[use], g[use], weights=n[use].astype(float),
                        init_guess={"var": 0.8 * var, "len_scale": max_lag / 3,
                                    "nugget": 0.2 * var}, loss="linear", max_eval=5000)
    vg = Variogram(family, float(model.var), float(model.len_scale), float(model.nugget))
    return fitting.Fit(variogram=vg, method="wls")


def test_the_check_catches_the_old_squared_count_weighting(setting, monkeypatch):
    monkeypatch.setitem(fitting.FIT_METHODS, "wls", _old_wls)
    tab = run(setting, "wls")
    assert not calibrated(tab), tab
