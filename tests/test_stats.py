import numpy as np
import pytest

from coldindex.stats import (
    effective_sample_size,
    lag1_autocorrelation,
    lag1_bias_corrected,
    simulate_ar1,
)


def test_lag1_hand_worked():
    # Hand-worked: x = 1,2,3,4,5; d = -2,-1,0,1,2; sum d_t d_t+1 = 2+0+0+2 = 4; sum d^2 = 10.
    assert lag1_autocorrelation([1, 2, 3, 4, 5]) == pytest.approx(0.4)
    # Marriott-Pope-Kendall: (n r + 1) / (n - 3) = (5 * 0.4 + 1) / 2 = 1.5 -> clipped 0.99.
    assert lag1_bias_corrected([1, 2, 3, 4, 5]) == pytest.approx(0.99)


def test_bias_correction_reduces_bias():
    # Truth by construction: 4000 AR(1) series, rho = 0.5, n = 50. The plain estimator's
    # mean is about rho - (1 + 3 rho)/n = 0.45; the corrected one's within 0.02 of 0.5.
    x = simulate_ar1(0.5, 50, 4000, np.random.default_rng(4))
    plain = np.mean([lag1_autocorrelation(s) for s in x])
    corrected = np.mean([lag1_bias_corrected(s) for s in x])
    assert plain == pytest.approx(0.45, abs=0.015)
    assert corrected == pytest.approx(0.5, abs=0.02)


def test_simulate_ar1_moments():
    x = simulate_ar1(0.7, 200, 2000, np.random.default_rng(1), sd=2.0)
    assert x.std() == pytest.approx(2.0, rel=0.02)
    r = np.mean(x[:, 1:] * x[:, :-1]) / np.mean(x * x)
    assert r == pytest.approx(0.7, abs=0.01)


def test_effective_sample_size():
    # Source: Bretherton et al. 1999, J. Climate 12, eq. 30: n (1 - r) / (1 + r);
    # hand-worked n = 40, r = 0.5 -> 40 * 0.5 / 1.5 = 13.33.
    assert effective_sample_size(40, 0.5) == pytest.approx(40 / 3)
    assert effective_sample_size(40, -0.5) == 40  # never more than n


def test_subsample_lag1_is_robust_to_a_step():
    from coldindex.stats import lag1_subsample_median, robust_sd

    x = simulate_ar1(0.5, 50, 400, np.random.default_rng(8))
    stepped = x.copy()
    stepped[:, 25:] += 3.0
    whole = np.mean([lag1_bias_corrected(s) for s in stepped])
    sub = np.mean([lag1_subsample_median(s) for s in stepped])
    clean = np.mean([lag1_subsample_median(s) for s in x])
    assert whole > 0.75  # the step inflates the whole-series estimate
    assert abs(sub - clean) < 0.15 and whole - clean > 2 * abs(sub - clean)
    # robust_sd of white noise estimates its SD; a step barely moves it.
    w = np.random.default_rng(1).normal(0, 2.0, 5000)
    assert robust_sd(w) == pytest.approx(2.0, rel=0.05)
    w[2500:] += 10
    assert robust_sd(w) == pytest.approx(2.0, rel=0.05)


def test_pair_effective_size_and_fisher_z_hand_worked():
    from scipy.stats import norm

    from coldindex.stats import effective_sample_size_pair, fisher_z_test

    # Source: Bretherton et al. 1999, J. Climate 12, eq. 31; hand-worked: n = 40,
    # r1x = r1y = 0.6 -> 40 (1 - 0.36) / (1 + 0.36) = 18.8235.
    assert effective_sample_size_pair(40, 0.6, 0.6) == pytest.approx(18.8235, abs=1e-4)
    # Source: Fisher 1921; hand-worked: r = 0.5, n_eff = 28 -> z = atanh(0.5) = 0.549306,
    # se = 1/5 = 0.2, 90 % bounds tanh(0.549306 -+ 1.644854 * 0.2) = 0.2168, 0.6993,
    # p = 2 (1 - Phi(2.74653)) = 0.006023.
    lo, hi, p = fisher_z_test(0.5, 28, 0.9)
    assert lo == pytest.approx(np.tanh(0.549306 - 0.328971), abs=1e-5)
    assert hi == pytest.approx(np.tanh(0.549306 + 0.328971), abs=1e-5)
    assert p == pytest.approx(2 * norm.sf(2.74653), abs=1e-6)


def test_fisher_z_agrees_with_scipy_pearsonr_on_white_series():
    from scipy.stats import pearsonr

    from coldindex.stats import fisher_z_test

    # Independent reference: scipy.stats.pearsonr (exact t-based p for white series). Fisher z
    # with n_eff = n is an approximation; both agree to 0.01 at n = 60.
    rng = np.random.default_rng(3)
    for _ in range(5):
        x = rng.normal(size=60)
        y = 0.3 * x + rng.normal(size=60)
        res = pearsonr(x, y)
        _, _, p = fisher_z_test(res.statistic, 60)
        assert p == pytest.approx(res.pvalue, abs=0.01)


def test_williams_t_against_independent_implementation():
    from coldindex.stats import williams_t

    # Source: R package psych, r.test(n = 30, r12 = 0.50, r13 = 0.10, r23 = 0.70) prints
    # "t value 3.38" (an independent implementation of Williams' T2, Steiger 1980, eq. 7).
    t, p = williams_t(0.5, 0.1, 0.7, 30)
    assert t == pytest.approx(3.38, abs=0.005)
    assert 0 < p < 0.0021 / 2 + 1e-4


def test_benjamini_hochberg_hand_worked():
    from coldindex.stats import benjamini_hochberg

    # Hand-worked (Benjamini & Hochberg 1995): p = 0.01, 0.04, 0.03, 0.20 (m = 4):
    # sorted 0.01, 0.03, 0.04, 0.20 -> 0.04, 0.06, 0.0533, 0.20 -> monotone 0.04, 0.0533,
    # 0.0533, 0.20.
    q = benjamini_hochberg([0.01, 0.04, 0.03, 0.20, np.nan])
    np.testing.assert_allclose(q[:4], [0.04, 0.16 / 3, 0.16 / 3, 0.20])
    assert np.isnan(q[4])


def test_naive_and_adjusted_test_size_on_red_pairs():
    from coldindex.stats import effective_sample_size_pair, fisher_z_test

    # Monte Carlo (fixed seed, 4000 pairs of independent AR(1) series, rho = 0.7, n = 40):
    # the naive test (n_eff = n) rejects at the 90 % level in more than 25 % of pairs; with
    # Bretherton's n_eff and bias-corrected lag-1 estimates, in 3-15 %. Estimator: share.
    rng = np.random.default_rng(11)
    X = simulate_ar1(0.7, 40, 4000, rng)
    Y = simulate_ar1(0.7, 40, 4000, rng)
    naive = adjusted = 0
    for x, y in zip(X, Y, strict=True):
        r = np.corrcoef(x, y)[0, 1]
        naive += fisher_z_test(r, 40)[2] < 0.1
        ne = effective_sample_size_pair(40, lag1_bias_corrected(x), lag1_bias_corrected(y))
        adjusted += fisher_z_test(r, ne)[2] < 0.1
    assert naive / 4000 > 0.25
    assert 0.03 <= adjusted / 4000 <= 0.15


def test_edge_cases():
    from coldindex.stats import (
        benjamini_hochberg,
        effective_sample_size,
        fisher_z_test,
        lag1_subsample_median,
        robust_sd,
        williams_t,
    )

    assert lag1_autocorrelation([1, 1, 1]) == 0.0
    assert -0.99 <= lag1_bias_corrected([1, 2, 1, 2]) <= 0.99  # n <= 4: plain, clipped
    assert lag1_subsample_median([1, 2, 3, 2]) == lag1_bias_corrected([1, 2, 3, 2])
    assert robust_sd([1.0]) == 0.0
    assert effective_sample_size(10, 0.99) == 2.0
    assert all(np.isnan(v) for v in fisher_z_test(0.5, 3.0))
    assert all(np.isnan(v) for v in williams_t(0.5, 0.1, 0.7, 3))
    assert np.isnan(williams_t(1.0, 1.0, -1.0, 30)[0])
    assert np.isnan(benjamini_hochberg([np.nan, np.nan])).all()
    with pytest.raises(ValueError, match="phi needs to be in"):
        simulate_ar1(1.0, 10, 1, np.random.default_rng(0))
