import numpy as np
import pytest

from coldindex.interpolate import (
    FAMILIES,
    Kriging,
    Variogram,
    correlation,
    covariance_blocked,
    drift_matrix,
    idw_loo,
    idw_predict,
)

# Isaaks & Srivastava (1989), ch. 12: seven samples around the target (65E, 137N).
IS_XY = np.array([[61, 139], [63, 140], [64, 129], [68, 128], [71, 140], [73, 141],
                  [75, 128]], float)
IS_V = np.array([477, 696, 227, 646, 606, 791, 783], float)
IS_TARGET = np.array([[65.0, 137.0]])


@pytest.mark.parametrize("family", FAMILIES)
def test_correlation_matches_gstools(family):
    import gstools as gs

    # Independent reference: GSTools' own correlation functions (Müller et al. 2022, GMD 15).
    cls = {"exponential": gs.Exponential, "spherical": gs.Spherical, "gaussian": gs.Gaussian,
           "matern": gs.Matern}[family]
    kw = {"nu": 1.5} if family == "matern" else {}
    model = cls(dim=2, var=1.0, len_scale=30.0, **kw)
    h = np.linspace(0, 120, 61)
    np.testing.assert_allclose(correlation(family, h / 30.0), model.correlation(h), atol=1e-12)


@pytest.mark.parametrize("vg, filtered, estimate, variance", [
    # Source: Isaaks & Srivastava 1989, ch. 12, Fig. 12.3: C(h) = 10 exp(-0.3 h);
    # estimate 593 (rounded), OK variance 8.96 (values as tabulated in geoR's test suite).
    (Variogram("exponential", 10.0, 10 / 3, 0.0), False, 593, 8.96),
    # Source: ibid., Fig. 12.6: sill doubled -> same estimate, variance 17.91.
    (Variogram("exponential", 20.0, 10 / 3, 0.0), False, 593, 17.91),
    # Source: ibid., Fig. 12.12: range doubled -> 572, 5.76.
    (Variogram("exponential", 10.0, 20 / 3, 0.0), False, 572, 5.76),
    # Source: ibid., Fig. 12.8: Gaussian C(h) = 10 exp(-0.03 h^2) -> 559, 4.78; in GSTools'
    # convention exp(-pi/4 (h/l)^2), so l = sqrt(pi / (4 * 0.03)).
    (Variogram("gaussian", 10.0, float(np.sqrt(np.pi / 0.12)), 0.0), False, 559, 4.78),
    # Source: ibid., Fig. 12.10: nugget 5 + 5 exp(-0.3 h) -> 597, 10.31 (variance of a new
    # noisy value); the smooth process' variance is 10.31 - 5.
    (Variogram("exponential", 5.0, 10 / 3, 5.0), False, 597, 10.31),
    (Variogram("exponential", 5.0, 10 / 3, 5.0), True, 597, 5.31),
])
def test_isaaks_srivastava_worked_example(vg, filtered, estimate, variance):
    est, var, _ = Kriging(IS_XY, IS_V, vg).predict(IS_TARGET, filter_nugget=filtered)
    assert est[0] == pytest.approx(estimate, abs=0.5)
    assert var[0] == pytest.approx(variance, abs=0.006)


def test_isaaks_srivastava_weights():
    # Source: Isaaks & Srivastava 1989, Table 12.2 (OK weights for Fig. 12.3), From memory:
    # 0.173, 0.318, 0.129, 0.086, 0.151, 0.057, 0.086.
    w = Kriging(IS_XY, IS_V, Variogram("exponential", 10.0, 10 / 3, 0.0)).weights(IS_TARGET)
    np.testing.assert_allclose(w[0], [0.173, 0.318, 0.129, 0.086, 0.151, 0.057, 0.086],
                               atol=0.0015)


@pytest.fixture(scope="module")
def stations():
    rng = np.random.default_rng(7)
    xy = rng.uniform(0, 300, (120, 2))
    z = np.sin(xy[:, 0] / 50) + np.cos(xy[:, 1] / 70) + rng.normal(0, 0.1, 120)
    gx, gy = np.meshgrid(np.linspace(5, 295, 30), np.linspace(5, 295, 25))
    return xy, z, np.column_stack([gx.ravel(), gy.ravel()])


def test_against_pykrige(stations):
    from pykrige.ok import OrdinaryKriging

    xy, z, targets = stations
    vg = Variogram("exponential", 0.8, 60.0, 0.05)
    # pykrige's exponential uses range/3 as the scale: range = 3 * len_scale.
    ok = OrdinaryKriging(xy[:, 0], xy[:, 1], z, variogram_model="exponential",
                         variogram_parameters={"psill": 0.8, "range": 180.0, "nugget": 0.05})
    ref_est, ref_var = ok.execute("points", targets[:, 0], targets[:, 1], backend="vectorized")
    est, var, _ = Kriging(xy, z, vg).predict(targets)
    np.testing.assert_allclose(est, ref_est, atol=1e-8)
    # pykrige reports the variance of a new noisy value; ours is the smooth process'.
    np.testing.assert_allclose(var, np.asarray(ref_var) - 0.05, atol=1e-8)


def test_against_gstools(stations):
    import gstools as gs

    xy, z, targets = stations
    model = gs.Spherical(dim=2, var=0.8, len_scale=120.0, nugget=0.05)
    krig = gs.krige.Ordinary(model, (xy[:, 0], xy[:, 1]), z, exact=False, pseudo_inv=False)
    ref_est, ref_var = krig((targets[:, 0], targets[:, 1]), return_var=True)
    est, var, _ = Kriging(xy, z, Variogram("spherical", 0.8, 120.0, 0.05)).predict(targets)
    np.testing.assert_allclose(est, ref_est, atol=1e-8)
    np.testing.assert_allclose(var, ref_var - 0.05, atol=1e-8)


def test_exact_at_casts_without_nugget_and_linear_properties(stations):
    xy, z, targets = stations
    vg = Variogram("exponential", 0.8, 60.0, 0.0)
    kr = Kriging(xy, z, vg)
    est, var, _ = kr.predict(xy, filter_nugget=False)
    np.testing.assert_allclose(est, z, atol=1e-6)
    np.testing.assert_allclose(var, 0.0, atol=1e-6)
    w = kr.weights(targets)
    np.testing.assert_allclose(w.sum(axis=1), 1.0, atol=1e-10)
    shifted, _, _ = Kriging(xy, z + 3.5, vg).predict(targets)
    base, _, _ = kr.predict(targets)
    np.testing.assert_allclose(shifted, base + 3.5, atol=1e-9)


def test_filtered_map_is_smoother_than_data(stations):
    xy, z, _ = stations
    est, var, _ = Kriging(xy, z, Variogram("exponential", 0.8, 60.0, 0.05)).predict(xy)
    assert np.all(var > 0)
    assert np.std(est) < np.std(z)


@pytest.mark.parametrize("drift", [None, "depth"])
def test_dubrule_loo_equals_explicit_refits(stations, drift):
    xy, z, _ = stations
    d = xy[:, 0] * 0.3 + 5 if drift else None
    vg = Variogram("matern", 0.7, 40.0, 0.04)
    err, evar = Kriging(xy, z, vg, d).loo()
    for i in range(len(z)):
        keep = np.arange(len(z)) != i
        kr = Kriging(xy[keep], z[keep], vg, None if d is None else d[keep])
        est, var, _ = kr.predict(xy[i:i + 1], None if d is None else d[i:i + 1],
                                 filter_nugget=False)
        assert err[i] == pytest.approx(z[i] - est[0], abs=1e-8)
        assert evar[i] == pytest.approx(var[0], abs=1e-8)


def test_external_drift_reproduces_linear_trend():
    rng = np.random.default_rng(3)
    xy = rng.uniform(0, 200, (60, 2))
    depth = rng.uniform(20, 200, 60)
    z = 0.02 * depth - 1.0
    kr = Kriging(xy, z, Variogram("exponential", 0.1, 50.0, 0.01), depth)
    est, _, _ = kr.predict([[100.0, 100.0]], [150.0])
    assert est[0] == pytest.approx(0.02 * 150 - 1.0, abs=1e-8)


def test_idw_exact_and_loo(stations):
    xy, z, _ = stations
    np.testing.assert_allclose(idw_predict(xy, z, xy), z)
    err = idw_loo(xy, z)
    i = 5
    keep = np.arange(len(z)) != i
    assert err[i] == pytest.approx(z[i] - idw_predict(xy[keep], z[keep], xy[i:i + 1])[0])


@pytest.mark.parametrize("family", FAMILIES)
def test_blocked_covariance_equals_the_plain_formula(family):
    # Block edges fall inside rows and between them (33 columns, 32768-element blocks).
    rng = np.random.default_rng(2)
    d = rng.uniform(0, 400, (2500, 33))
    ref = 0.7 * correlation(family, d / 85.0)
    np.testing.assert_allclose(covariance_blocked(family, d, 85.0, 0.7), ref, rtol=1e-14,
                               atol=1e-15)
    out = d.copy()
    covariance_blocked(family, out, 85.0, 0.7, out=out)  # in place, as the kriging does
    np.testing.assert_allclose(out, ref, rtol=1e-14, atol=1e-15)
    np.testing.assert_allclose(Variogram(family, 0.7, 85.0, 0.1).covariance(d[:5, 0]),
                               ref[:5, 0], rtol=1e-14, atol=1e-15)


@pytest.mark.parametrize("drift", [None, "depth"])
@pytest.mark.parametrize("filtered", [True, False])
def test_variance_by_triangular_solve_equals_the_lagrange_system(stations, drift, filtered):
    # The variance from v = L^-1 c equals the one from solving the full (n + p) Lagrange
    # system of Isaaks & Srivastava (1989, eq. 12.14, with a drift) densely, to 1e-10.
    xy, z, targets = stations
    d = xy[:, 0] * 0.3 + 5 if drift else None
    d0 = targets[:, 0] * 0.3 + 5 if drift else None
    vg = Variogram("spherical", 0.8, 90.0, 0.05)
    est, var, W = Kriging(xy, z, vg, d).predict(targets, d0, filter_nugget=filtered,
                                                 return_weights=True)
    n = len(z)
    F = drift_matrix(n, d)
    f0 = drift_matrix(len(targets), d0)
    p = F.shape[1]
    from scipy.spatial.distance import cdist

    K = vg.covariance(cdist(xy, xy)) + (vg.nugget + 1e-10 * 0.85) * np.eye(n)
    A = np.block([[K, F], [F.T, np.zeros((p, p))]])
    c = vg.covariance(cdist(targets, xy))
    if not filtered:
        c = c + vg.nugget * (cdist(targets, xy) == 0)
    sol = np.linalg.solve(A, np.vstack([c.T, f0.T]))  # weights and multipliers
    c00 = vg.sill + (0.0 if filtered else vg.nugget)
    ref_var = c00 - np.einsum("ij,ij->j", sol, np.vstack([c.T, f0.T]))
    np.testing.assert_allclose(var, np.maximum(ref_var, 0.0), atol=1e-10)
    np.testing.assert_allclose(W, sol[:n].T, atol=1e-10)
    np.testing.assert_allclose(est, sol[:n].T @ z, atol=1e-10)
