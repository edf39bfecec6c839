"""Variogram fits: restricted/plain likelihood and least squares, and the parameter draws.

Truths here are known by construction (fields simulated by Cholesky from a stated model)
or checked against independent references (scipy's multivariate normal density, the
unbiased variance of ordinary least squares)."""

import numpy as np
import pytest
from scipy.linalg import null_space
from scipy.spatial.distance import cdist
from scipy.stats import multivariate_normal

from coldindex.dense import fit_year
from coldindex.fitting import (
    _Profile,
    draw_variograms,
    fit_variogram,
    fit_wls,
    fixed_fit,
    with_posterior,
)
from coldindex.interpolate import Variogram, correlation, drift_matrix

TRUTH = Variogram("exponential", 1.0, 50.0, 0.05)


def field(seed, n=300, extent=500.0, vg=TRUTH, drift_coef=0.0):
    rng = np.random.default_rng(seed)
    xy = rng.uniform(0, extent, (n, 2))
    K = vg.covariance(cdist(xy, xy)) + vg.nugget * np.eye(n)
    depth = 100 + 0.3 * xy[:, 0]
    z = 2.0 + drift_coef * depth + np.linalg.cholesky(K) @ rng.standard_normal(n)
    return xy, z, depth


def test_restricted_likelihood_equals_the_density_of_error_contrasts():
    # Source: Harville 1977, JASA 72, eq. 3.5 / Patterson & Thompson 1971: the restricted
    # likelihood is the likelihood of n - p error contrasts A^T z (A spans the null space of
    # F^T), up to a constant. Independent reference: scipy.stats.multivariate_normal.
    xy, z, depth = field(1, n=60, drift_coef=0.01)
    F = drift_matrix(60, depth)
    prof = _Profile(xy, z, F, "exponential", restricted=True)
    A = null_space(F.T)
    D = cdist(xy, xy)

    def contrast_m2ll(len_scale, share):
        f, s = prof.evaluate(len_scale, share)
        V = share * correlation("exponential", D / len_scale) + (1 - share) * np.eye(60)
        ref = -2 * multivariate_normal(np.zeros(58), s * A.T @ V @ A).logpdf(A.T @ z)
        return f, ref

    (f1, r1), (f2, r2) = contrast_m2ll(40.0, 0.9), contrast_m2ll(120.0, 0.6)
    # Differences between parameter values agree (the constants cancel).
    assert f1 - f2 == pytest.approx(r1 - r2, abs=1e-6)


def test_pure_nugget_reml_variance_is_the_unbiased_ols_variance():
    # Source: Harville 1977, sect. 3 (REML with V = I gives the residual mean square with
    # n - p degrees of freedom; ML divides by n).
    rng = np.random.default_rng(3)
    xy = rng.uniform(0, 100, (80, 2))
    depth = rng.uniform(50, 150, 80)
    z = 1 + 0.02 * depth + rng.normal(0, 0.5, 80)
    F = drift_matrix(80, depth)
    beta, *_ = np.linalg.lstsq(F, z, rcond=None)
    rss = float(np.sum((z - F @ beta) ** 2))
    _, s_reml = _Profile(xy, z, F, "exponential", True).evaluate(10.0, 0.0)
    _, s_ml = _Profile(xy, z, F, "exponential", False).evaluate(10.0, 0.0)
    assert s_reml == pytest.approx(rss / (80 - 2), rel=1e-8)
    assert s_ml == pytest.approx(rss / 80, rel=1e-8)


@pytest.fixture(scope="module")
def reml_fits():
    return [fit_variogram(*field(seed)[:2], "exponential") for seed in range(8)]


def test_reml_recovers_length_scale_and_nugget(reml_fits):
    # Truth by construction (len 50 km, sill 1, nugget 0.05); one field varies, so judge
    # medians over 8 fields.
    lens = [f.variogram.len_scale for f in reml_fits]
    nugs = [f.variogram.nugget for f in reml_fits]
    sills = [f.variogram.sill for f in reml_fits]
    assert 38 < np.median(lens) < 65
    assert np.median(nugs) < 0.12
    assert 0.7 < np.median(sills) < 1.3
    assert all(f.method == "reml" and f.at_bound == () for f in reml_fits)


def test_reml_with_depth_drift_estimates_jointly():
    xy, z, depth = field(5, drift_coef=0.02)
    fit = fit_variogram(xy, z, "exponential", depth)
    assert 30 < fit.variogram.len_scale < 90
    # Without the drift in the model the trend inflates the length scale.
    naive = fit_variogram(xy, z, "exponential")
    assert naive.variogram.len_scale > fit.variogram.len_scale


def test_ml_variance_is_smaller_than_reml_with_a_drift():
    xy, z, depth = field(6, n=80, drift_coef=0.02)
    reml = fit_variogram(xy, z, "exponential", depth, method="reml").variogram
    ml = fit_variogram(xy, z, "exponential", depth, method="ml").variogram
    assert ml.sill + ml.nugget < reml.sill + reml.nugget


def test_wls_weights_bins_by_pair_counts():
    # The documented objective sum N_h (gamma_hat - gamma)^2 is minimal at the fit: any
    # small change of the parameters raises it. (GSTools takes weights as 1/sigma; passing
    # the counts themselves would minimise sum N_h^2 (...)^2 instead.)
    import gstools as gs

    xy, z, _ = field(2)
    fit = fit_wls(xy, z, "exponential")
    vg = fit.variogram
    resid = z - z.mean()
    diag = float(np.hypot(*np.ptp(xy, axis=0)))
    nn = np.sort(cdist(xy, xy), axis=1)[:, 1]
    edges = np.linspace(0, max(0.5 * diag, 3 * np.median(nn)), 13)
    c, g, n = gs.vario_estimate((xy[:, 0], xy[:, 1]), resid, edges, return_counts=True)

    def objective(v):
        return float(np.sum(n * (g - v.semivariance(c)) ** 2))

    base = objective(vg)
    for d in (0.97, 1.03):
        for k in ("sill", "len_scale", "nugget"):
            kw = {"family": vg.family, "sill": vg.sill, "len_scale": vg.len_scale,
                  "nugget": vg.nugget}
            kw[k] = kw[k] * d if kw[k] > 0 else 1e-3
            assert objective(Variogram(**kw)) >= base * (1 - 1e-6)


def test_length_scale_at_a_bound_is_noted():
    # A plane plus tiny noise: no finite length scale fits better than the longest allowed.
    rng = np.random.default_rng(4)
    xy = rng.uniform(0, 100, (60, 2))
    z = 0.05 * xy[:, 0] + rng.normal(0, 0.01, 60)
    fit = fit_variogram(xy, z, "exponential")
    assert any("upper bound" in n for n in fit.at_bound)


def test_posterior_draws_spread_around_the_fit_and_are_reproducible(reml_fits):
    xy, z, _ = field(0)
    fit = with_posterior(reml_fits[0], xy, z)
    assert fit.posterior is not None
    assert fit.posterior.prob.sum() == pytest.approx(1.0)
    d1 = draw_variograms(fit, 400, np.random.default_rng(7))
    d2 = draw_variograms(fit, 400, np.random.default_rng(7))
    assert d1 == d2
    lens = np.log([v.len_scale for v in d1])
    tot = np.array([v.sill + v.nugget for v in d1])
    # Centred on the fit, with a real spread (a few tens of percent for 300 casts).
    assert abs(np.median(lens) - np.log(fit.variogram.len_scale)) < 0.15
    assert 0.05 < lens.std() < 0.6
    assert abs(np.median(tot) / (fit.variogram.sill + fit.variogram.nugget) - 1) < 0.15
    # A least-squares fit has no posterior: the point estimate is repeated.
    w = fit_wls(xy, z, "exponential")
    assert draw_variograms(w, 3, np.random.default_rng(1)) == [w.variogram] * 3


@pytest.mark.parametrize("family", ["exponential", "spherical", "matern", "gaussian"])
@pytest.mark.parametrize("restricted", [True, False])
def test_likelihood_evaluation_equals_a_direct_dense_evaluation(family, restricted):
    # The LAPACK evaluation (one factor, one stacked triangular solve, a reused buffer)
    # against the textbook formula with dense solves and log-determinants, to 1e-10.
    xy, z, depth = field(4, n=80, drift_coef=0.01)
    F = drift_matrix(80, depth)
    prof = _Profile(xy, z, F, family, restricted=restricted)
    D = cdist(xy, xy)
    n, p = F.shape
    dof = n - p if restricted else n
    for len_scale, share in ((30.0, 0.95), (150.0, 0.4), (60.0, 0.0)):
        V = share * correlation(family, D / len_scale) + (1 - share + 1e-8) * np.eye(n)
        Vi_F, Vi_z = np.linalg.solve(V, F), np.linalg.solve(V, z)
        G = F.T @ Vi_F
        beta = np.linalg.solve(G, F.T @ Vi_z)
        r = z - F @ beta
        q = r @ np.linalg.solve(V, r)
        ref = dof * np.log(q / dof) + np.linalg.slogdet(V)[1]
        if restricted:
            ref += np.linalg.slogdet(G)[1]
        for _ in range(2):  # the second call reuses the buffer of the first
            f, s = prof.evaluate(len_scale, share)
            assert f == pytest.approx(ref, abs=1e-10, rel=1e-12)
            assert s == pytest.approx(q / dof, rel=1e-10)


def test_a_matrix_that_is_not_positive_definite_is_infinite_not_an_error():
    xy = np.array([[0.0, 0.0], [0.0, 0.0], [10.0, 0.0], [0.0, 10.0], [7.0, 7.0]])
    prof = _Profile(xy, np.array([1.0, 2.0, 0.5, 0.1, 0.3]), drift_matrix(5, None),
                    "gaussian", restricted=True)
    # Two casts at one place correlated 1.5 with a variance of 1: not a covariance matrix.
    f, s = prof.evaluate(50.0, 1.5)
    assert f == float("inf") and np.isnan(s)


def test_fixed_fit_is_given_not_estimated():
    xy, z, _ = field(5, n=40)
    vg = Variogram("exponential", 0.7, 90.0, 0.02)
    fit = fit_year(xy, z, "spherical", fixed=vg)  # the year's fit: given, not estimated
    assert fit.method == "fixed" and fit.posterior is None
    assert fit.variogram == Variogram("spherical", 0.7, 90.0, 0.02)
    assert draw_variograms(fit, 3, np.random.default_rng(0)) == [fit.variogram] * 3
    assert with_posterior(fit, xy, z) is fit
    with pytest.raises(ValueError, match="sill > 0"):
        fixed_fit("exponential", Variogram("exponential", 0.0, 90.0, 0.02))
