"""Shared statistics for autocorrelated yearly series.

Lag-1 autocorrelation (plain and bias-corrected), effective sample size and
AR(1) simulation, used by the regime-shift and skill computations.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike, NDArray

FloatArray = NDArray[np.float64]


def lag1_autocorrelation(x: ArrayLike) -> float:
    """Plain lag-1 autocorrelation ``sum(d_t d_{t+1}) / sum(d_t^2)``, d = x - mean(x).

    This is the usual (Yule-Walker type) estimator; it is biased low in short series.
    """
    v = np.asarray(x, dtype=np.float64)
    d = v - float(v.mean())
    den = float(np.dot(d, d))
    if den == 0.0:
        return 0.0
    return float(np.dot(d[:-1], d[1:]) / den)


def lag1_bias_corrected(x: ArrayLike) -> float:
    """Lag-1 autocorrelation with the Marriott-Pope-Kendall bias correction.

    For an AR(1) series of length n with an estimated mean, the plain estimate r
    has bias about ``-(1 + 3 rho) / n``; solving for rho gives
    ``(n r + 1) / (n - 3)``. The result is clipped to [-0.99, 0.99].

    References
    ----------
    Marriott, F. H. C. & Pope, J. A. (1954). Bias in the estimation of
    autocorrelations. Biometrika 41, 390-402.
    Kendall, M. G. (1954). Note on bias in the estimation of autocorrelation.
    Biometrika 41, 403-404.
    """
    n = len(np.asarray(x))
    r = lag1_autocorrelation(x)
    if n <= 4:
        return float(np.clip(r, -0.99, 0.99))
    return float(np.clip((n * r + 1.0) / (n - 3.0), -0.99, 0.99))


def lag1_subsample_median(x: ArrayLike, window: int = 15) -> float:
    """Shift-robust lag-1 autocorrelation: median of corrected estimates over windows.

    Every ``window``-long stretch of the series gets its own
    Marriott-Pope-Kendall corrected lag-1 estimate (:func:`lag1_bias_corrected`);
    the median over all stretches is returned. A level shift only touches the
    few windows that straddle it, so unlike the whole-series estimate it barely
    inflates the result (the subsample approach of Rodionov 2006).

    References
    ----------
    Rodionov, S. N. (2006). Use of prewhitening in climate regime shift
    detection. Geophys. Res. Lett. 33, L12707.
    """
    v = np.asarray(x, dtype=np.float64)
    m = min(int(window), len(v))
    if m < 5:
        return lag1_bias_corrected(v)
    windows = np.lib.stride_tricks.sliding_window_view(v, m)
    return float(np.median([lag1_bias_corrected(w) for w in windows]))


def robust_sd(x: ArrayLike) -> float:
    """Noise scale from first differences: ``1.4826 MAD(diff(x)) / sqrt(2)``.

    Level shifts barely move it, unlike the plain standard deviation. For an
    AR(1) series it estimates ``sigma sqrt(1 - rho)``, not the marginal SD; it is
    a scale for comparing series treated the same way.
    """
    d = np.diff(np.asarray(x, dtype=np.float64))
    if len(d) == 0:
        return 0.0
    return float(1.4826 * np.median(np.abs(d - np.median(d))) / np.sqrt(2.0))


def effective_sample_size(n: int, r1: float) -> float:
    """Effective sample size of the mean of an AR(1) series, ``n (1 - r) / (1 + r)``.

    References
    ----------
    Bretherton, C. S., Widmann, M., Dymnikov, V. P., Wallace, J. M. & Bladé, I.
    (1999). The effective number of spatial degrees of freedom of a time-varying
    field. J. Climate 12, 1990-2009, eq. 30.
    """
    r = float(np.clip(r1, -0.99, 0.99))
    return float(min(n, max(2.0, n * (1.0 - r) / (1.0 + r))))


def simulate_ar1(phi: float, n: int, size: int, rng: np.random.Generator,
                 sd: float = 1.0) -> FloatArray:
    """Stationary AR(1) series with marginal standard deviation ``sd``.

    Parameters
    ----------
    phi
        Lag-1 coefficient, |phi| < 1.
    n
        Length of each series.
    size
        Number of series.
    rng
        Random generator.
    sd
        Marginal standard deviation of the series.

    Returns
    -------
    numpy.ndarray
        Series of shape (size, n).
    """
    if not -1.0 < phi < 1.0:
        raise ValueError(f"phi needs to be in (-1, 1), got: {phi}")
    eps = rng.standard_normal((size, n))
    out = np.empty((size, n))
    out[:, 0] = eps[:, 0]
    innov = np.sqrt(1.0 - phi * phi)
    for t in range(1, n):
        out[:, t] = phi * out[:, t - 1] + innov * eps[:, t]
    return sd * out


def effective_sample_size_pair(n: int, r1x: float, r1y: float) -> float:
    """Effective sample size for the correlation of two AR(1)-like series.

    ``n (1 - r1x r1y) / (1 + r1x r1y)``, bounded to [2, n].

    References
    ----------
    Bretherton, C. S., Widmann, M., Dymnikov, V. P., Wallace, J. M. & Bladé, I.
    (1999). J. Climate 12, 1990-2009, eq. 31.
    """
    prod = float(np.clip(r1x * r1y, -0.99, 0.99))
    return float(min(n, max(2.0, n * (1.0 - prod) / (1.0 + prod))))


def fisher_z_test(r: float, n_eff: float, confidence: float = 0.9
                  ) -> tuple[float, float, float]:
    """Confidence interval and two-sided p-value of a correlation by Fisher's z.

    ``z = atanh(r)`` has standard error ``1 / sqrt(n_eff - 3)``.

    Returns
    -------
    tuple
        ``(r_lo, r_hi, p_value)``; NaN when ``n_eff <= 3``.

    References
    ----------
    Fisher, R. A. (1921). On the probable error of a coefficient of correlation
    deduced from a small sample. Metron 1, 3-32.
    """
    from scipy.special import ndtr, ndtri

    if not n_eff > 3 or not np.isfinite(r):
        return float("nan"), float("nan"), float("nan")
    z = float(np.arctanh(np.clip(r, -0.999999, 0.999999)))
    se = 1.0 / np.sqrt(n_eff - 3.0)
    zc = float(ndtri(0.5 + confidence / 2.0))
    p = 2.0 * float(ndtr(-abs(z) / se))
    return float(np.tanh(z - zc * se)), float(np.tanh(z + zc * se)), p


def williams_t(r12: float, r13: float, r23: float, n: float) -> tuple[float, float]:
    """Williams' t for two dependent correlations sharing variable 1.

    Tests r12 > r13 one-sided, with ``n - 3`` degrees of freedom.

    Returns
    -------
    tuple
        ``(t, one-sided p-value)``.

    References
    ----------
    Williams, E. J. (1959). Regression Analysis. Wiley. Recommended by
    Steiger, J. H. (1980). Tests for comparing elements of a correlation matrix.
    Psychol. Bull. 87, 245-251, eq. 7 (the T2 statistic).
    """
    from scipy import stats as sps

    if not n > 3:
        return float("nan"), float("nan")
    det = 1.0 - r12 * r12 - r13 * r13 - r23 * r23 + 2.0 * r12 * r13 * r23
    rbar = 0.5 * (r12 + r13)
    den = 2.0 * (n - 1.0) / (n - 3.0) * det + rbar * rbar * (1.0 - r23) ** 3
    if den <= 0:
        return float("nan"), float("nan")
    t = (r12 - r13) * np.sqrt((n - 1.0) * (1.0 + r23) / den)
    return float(t), float(sps.t.sf(t, n - 3.0))


def benjamini_hochberg(p: ArrayLike) -> FloatArray:
    """Benjamini-Hochberg q-values (NaN stays NaN).

    References
    ----------
    Benjamini, Y. & Hochberg, Y. (1995). Controlling the false discovery rate.
    J. R. Stat. Soc. B 57, 289-300.
    """
    p = np.asarray(p, dtype=np.float64)
    q = np.full_like(p, np.nan)
    ok = np.flatnonzero(np.isfinite(p))
    if len(ok) == 0:
        return q
    order = ok[np.argsort(p[ok], kind="stable")]
    m = len(order)
    ranked = p[order] * m / np.arange(1, m + 1)
    ranked = np.minimum.accumulate(ranked[::-1])[::-1]
    q[order] = np.minimum(ranked, 1.0)
    return q
