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
