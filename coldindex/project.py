"""Projected frequency of cold years and the year they stop, from climate-model trajectories.

Steps, per model x scenario x member:

1. **Bias adjustment** against the observed record over a calibration period:
   ``none``; ``delta`` (add the calibration-mean difference); ``qmap`` (empirical
   quantile mapping of the model's calibration distribution onto the observed
   one); ``qdm`` (quantile delta mapping, Cannon et al. 2015: each value's
   quantile in its own 30-year projection window is mapped onto the observed
   calibration distribution and the model's change at that quantile is added
   back). Beyond the calibration range, ``qmap`` extrapolates its correction as a
   constant (the correction at the nearest end). Bounded quantities (areas) are
   adjusted on the logit of the domain fraction, clipped to [0.001, 0.999]
   (zero-area and full-domain years are censored at those points), and returned
   within [0, domain area]; a result within 0.1 % of a bound is set to it.
2. **Expected value and noise**, per model x scenario (members pooled): a
   local-linear regression with tricube weights over a 30-year span; near 2100
   the window is one-sided and the local line continues the last decades'
   trend (no flattening assumed). The year-to-year noise about it is taken as
   a stationary AR(1) process: its marginal SD and lag-1 autocorrelation are
   estimated by the method of moments from the residuals, with the exact
   expected effect of the smoother on the residuals (the smoother's hat
   matrix; :func:`ar1_noise`), so neither the smoother's effective number of
   parameters nor the slow variation it absorbs biases the spread low.
3. **Cold-year probability** for every year under the fixed cut values:
   ``P(cold) = Phi((low - m) / s)`` for temperatures (``Phi((m - high) / s)`` for
   areas, larger is colder); 0 or 1 when the spread is zero. The counted share
   of cold years in the window of ``w`` years starting at each year is also
   given.
4. **The year cold years stop**: the first year Y <= END - w + 1 such that for Y
   and every later window start, the probability of at least one cold year in
   the w-year window is below ``p``, that probability being the Gaussian
   orthant probability under the fitted AR(1) (:func:`prob_any_cold`; the
   product ``1 - prod(1 - P(cold))`` when the lag-1 autocorrelation is 0).
   States: ``stopped`` (a stop year), ``not_by_end`` (none by END; right-
   censored) and ``never_cold`` (cold years unlikely from the first window
   on: no stop year inside the record; left-censored).

The stop year is a time of emergence (Hawkins & Sutton 2012) read at the cold
tail: the year the expected signal has moved far enough from the cold-class
cut, measured in units of the year-to-year noise, that cold years become
unlikely over a whole window.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray
from scipy.optimize import brentq
from scipy.special import expit, logit, ndtr, ndtri

from coldindex.classify import Cuts
from coldindex.errors import InputError, TooFewDataError
from coldindex.schema import EMERGENCE, numeric_column

FloatArray = NDArray[np.float64]
ADJUSTMENTS = ("none", "delta", "qmap", "qdm")
FRACTION_CLIP = 1e-3
MIN_CALIBRATION_YEARS = 20
PHI_LIMIT = 0.95
STATES = ("stopped", "not_by_end", "never_cold")
EMERGENCE_COLUMNS = EMERGENCE.columns


@dataclass(frozen=True)
class ProjectOptions:
    """Settings of the projection (``coldindex project``).

    ``short_calibration`` accepts fewer than 20 calibration years (with an
    explicit ``calibration``; recorded in ``emergence.csv``);
    ``adjusted_upstream`` names the adjustment already applied per grid cell on
    the gridded path (the guard then applies as well).
    """

    adjust: str = "qdm"
    calibration: tuple[int, int] | None = None
    window: int = 10
    p_stop: float = 0.1
    span: int = 30
    qdm_window: int = 30
    short_calibration: bool = False
    adjusted_upstream: str = "none"

    def __post_init__(self) -> None:
        def refuse(key: str, sentence: str) -> None:
            raise InputError("{option} " + sentence, option=("project", key))

        if self.adjust not in ADJUSTMENTS:
            refuse("adjust", f"needs to be one of {', '.join(ADJUSTMENTS)}, got: "
                   f"{self.adjust!r}.")
        if self.window < 1:
            refuse("window", f"needs to be >= 1, got: {self.window}.")
        if not 0 < self.p_stop < 1:
            refuse("p_stop", f"needs to be in (0, 1), got: {self.p_stop}.")
        if self.short_calibration and self.calibration is None:
            refuse("short_calibration", "needs an explicit calibration period A-B (the years "
                   "you accept as calibration).")


def trajectory_frame(raw: pd.DataFrame, source: str = "trajectories") -> pd.DataFrame:
    """Validate trajectories read as strings; refuse models with gaps.

    Returns
    -------
    pandas.DataFrame
        ``model``, ``scenario``, ``member`` (``r1`` when absent), ``year``, ``value``.
    """
    out = pd.DataFrame({"model": raw["model"].astype(str), "scenario": raw["scenario"].astype(str),
                        "member": raw["member"].astype(str) if "member" in raw else "r1"})
    for col in ("year", "value"):
        out[col] = numeric_column(raw, col, source, whole=col == "year")
    out["year"] = out["year"].astype(int)
    keys = ["model", "scenario", "member"]
    dup = out.duplicated([*keys, "year"], keep=False)
    if dup.any():
        r = raw.loc[dup, "row"].iloc[0]
        raise InputError(f"{source}, row {r}: a model, scenario, member and year appear more "
                         "than once.")
    for key, g in out.groupby(keys):
        yrs = np.sort(g["year"].to_numpy())
        if len(yrs) > 1 and np.any(np.diff(yrs) != 1):
            missing = sorted(set(range(yrs[0], yrs[-1] + 1)) - set(yrs.tolist()))
            raise InputError(f"{source}: model {key[0]}, scenario {key[1]}, member {key[2]} "
                             f"has gaps (missing {', '.join(map(str, missing[:5]))}); give "
                             "complete annual series.")
    return out.sort_values([*keys, "year"]).reset_index(drop=True)


UNIT_ALIASES = {"degc": "degC", "°c": "degC", "c": "degC", "celsius": "degC",
                "km2": "km2", "km^2": "km2", "km²": "km2"}


def check_units(column: str, units: str | None) -> None:
    """Refuse trajectory units that differ from the observed column's schema unit."""
    expected = "km2" if column.endswith("_km2") or "_km2_" in column else (
        "degC" if column.endswith("_c") else None)
    if units is None or expected is None:
        return
    got = UNIT_ALIASES.get(units.strip().lower(), units)
    if got != expected:
        raise InputError(f"{{option}} {units!r} differ from the unit of {column!r} ({expected}); "
                         "convert the trajectories first (kelvin: subtract 273.15).",
                         option=("project", "units"))


def _to_scale(x: FloatArray, bound: float | None) -> FloatArray:
    if bound is None:
        return x
    f = np.clip(x / bound, FRACTION_CLIP, 1 - FRACTION_CLIP)
    return np.asarray(logit(f), dtype=np.float64)


def _from_scale(z: FloatArray, bound: float | None) -> FloatArray:
    if bound is None:
        return z
    f = expit(z)
    f = np.where(f <= FRACTION_CLIP * 1.0001, 0.0, np.where(f >= 1 - FRACTION_CLIP * 1.0001,
                                                             1.0, f))
    return np.asarray(f * bound, dtype=np.float64)


def plotting_positions(n: int) -> FloatArray:
    """Hazen plotting positions ``(i - 0.5) / n`` of a sample of ``n`` values.

    References
    ----------
    Hyndman, R. J. & Fan, Y. (1996). Sample quantiles in statistical packages.
    Am. Stat. 50, 361-365 (definition 5).
    """
    return (np.arange(1, n + 1) - 0.5) / n


def sample_quantile(sample: ArrayLike, tau: ArrayLike) -> FloatArray:
    """Quantiles of a sample, Hyndman & Fan (1996) definition 5 (Hazen).

    The i-th smallest of n values is the quantile at ``(i - 0.5) / n``; linear
    in between; the smallest (largest) value below (above) the first (last)
    position. This is the one definition used for model and observed samples
    alike, so a sample mapped onto itself is returned unchanged.

    References
    ----------
    Hyndman, R. J. & Fan, Y. (1996). Sample quantiles in statistical packages.
    Am. Stat. 50, 361-365 (definition 5).
    """
    s = np.sort(np.asarray(sample, float))
    return np.asarray(np.interp(np.asarray(tau, float), plotting_positions(len(s)), s),
                      dtype=np.float64)


def quantile_map(x: ArrayLike, model_cal: ArrayLike, obs_cal: ArrayLike) -> FloatArray:
    """Empirical quantile mapping with constant extrapolation of the correction.

    Each value's non-exceedance probability in the model's calibration sample
    (linear interpolation between the order statistics at their Hazen positions
    ``(i - 0.5) / n``) is mapped to the same quantile of the observed
    calibration sample, with the same definition (:func:`sample_quantile`).
    Beyond the model's calibration range the correction at the nearest end is
    added. Applied to its own calibration sample (model = observed) it returns
    the sample; with equal sample sizes the i-th smallest model value goes to
    the i-th smallest observed value.

    References
    ----------
    Panofsky, H. A. & Brier, G. W. (1968). Some Applications of Statistics to
    Meteorology. Pennsylvania State University, 40-45.
    Hyndman, R. J. & Fan, Y. (1996). Am. Stat. 50, 361-365 (definition 5).
    """
    x = np.asarray(x, float)
    m = np.sort(np.asarray(model_cal, float))
    pp = plotting_positions(len(m))
    tau = np.interp(x, m, pp)
    out = sample_quantile(obs_cal, tau)
    lo_corr = float(sample_quantile(obs_cal, pp[:1])[0]) - m[0]
    hi_corr = float(sample_quantile(obs_cal, pp[-1:])[0]) - m[-1]
    out = np.where(x < m[0], x + lo_corr, out)
    return np.asarray(np.where(x > m[-1], x + hi_corr, out), dtype=np.float64)


def quantile_delta_map(years: ArrayLike, x: ArrayLike, model_cal: ArrayLike,
                       obs_cal: ArrayLike, window: int = 30) -> FloatArray:
    """Quantile delta mapping (additive), Cannon et al. (2015).

    For each year t: tau = the value's non-exceedance probability among the
    model's values in the ``window`` years centred on t (shifted inward at the
    ends), at Hazen positions ``(rank - 0.5) / n`` (ties share their mean rank);
    the model's change at that quantile, ``x - Fmod_cal^-1(tau)``, is added to
    the observed calibration quantile ``Fobs_cal^-1(tau)``. Both inverse CDFs
    use :func:`sample_quantile` (one definition for model and observations).

    References
    ----------
    Cannon, A. J., Sobie, S. R. & Murdock, T. Q. (2015). Bias correction of GCM
    precipitation by quantile mapping: how well do methods preserve changes in
    quantiles and extremes? J. Climate 28, 6938-6959, eqs. 2-6.
    """
    y = np.asarray(years, int)
    x = np.asarray(x, float)
    mc = np.asarray(model_cal, float)
    oc = np.asarray(obs_cal, float)
    out = np.empty_like(x)
    n = len(y)
    w = min(window, n)
    order = np.argsort(y, kind="stable")
    for k, i in enumerate(order):
        start = int(np.clip(k - w // 2, 0, n - w))
        sample = x[order[start:start + w]]
        rank = np.sum(sample < x[i]) + 0.5 * (np.sum(sample == x[i]) + 1)
        tau = (rank - 0.5) / len(sample)
        out[i] = sample_quantile(oc, [tau])[0] + (x[i] - sample_quantile(mc, [tau])[0])
    return out


def adjust_series(years: ArrayLike, values: ArrayLike, obs_years: ArrayLike,
                  obs_values: ArrayLike, method: str, calibration: tuple[int, int],
                  bound: float | None = None, qdm_window: int = 30) -> FloatArray:
    """Bias-adjust one model trajectory against the observed record.

    Parameters
    ----------
    years, values
        The model trajectory.
    obs_years, obs_values
        The observed series (NaN allowed).
    method
        ``none``, ``delta``, ``qmap`` or ``qdm``.
    calibration
        Calibration period (A, B), inclusive.
    bound
        Upper bound (domain area) of a bounded quantity; None for temperatures.
    qdm_window
        Projection window of QDM, years.

    Returns
    -------
    numpy.ndarray
        Adjusted values, within [0, bound] when bounded.
    """
    y = np.asarray(years, int)
    v = np.asarray(values, float)
    if method == "none":
        return np.clip(v, 0, bound) if bound is not None else v.copy()
    oy = np.asarray(obs_years, int)
    ov = np.asarray(obs_values, float)
    in_cal = (y >= calibration[0]) & (y <= calibration[1])
    obs_cal = ov[(oy >= calibration[0]) & (oy <= calibration[1]) & np.isfinite(ov)]
    if in_cal.sum() < 5 or len(obs_cal) < 5:
        raise InputError(f"The calibration period {calibration[0]}-{calibration[1]} holds "
                         f"{int(in_cal.sum())} model years and {len(obs_cal)} observed years; "
                         "it needs at least 5 of each (adjust {option}).",
                         option=("project", "calibration"))
    z = _to_scale(v, bound)
    mc = z[in_cal]
    oc = _to_scale(obs_cal, bound)
    if method == "delta":
        out = z + (oc.mean() - mc.mean())
    elif method == "qmap":
        out = quantile_map(z, mc, oc)
    else:
        out = quantile_delta_map(y, z, mc, oc, qdm_window)
    return _from_scale(out, bound)


def local_linear_weights(years: ArrayLike, at: ArrayLike, span: int = 30) -> FloatArray:
    """Weights of the local-linear smoother: ``fitted = W @ values``, shape (len(at), n).

    Each row is the linear combination of all (pooled) values that gives the
    local-linear fit at that year, tricube weights over ``span`` years. Its rows
    at the data years form the smoother's hat matrix.

    References
    ----------
    Cleveland, W. S. (1979). Robust locally weighted regression and smoothing
    scatterplots. JASA 74, 829-836 (here without robustness iterations).
    """
    t = np.asarray(years, float)
    t0 = np.asarray(at, float)[:, None]
    h = span / 2.0 + 0.5
    d = np.abs(t[None, :] - t0) / h
    w = np.where(d < 1, (1 - d**3) ** 3, 0.0)
    sw = w.sum(axis=1, keepdims=True)
    tm = (w * t).sum(axis=1, keepdims=True) / sw
    var = (w * (t - tm) ** 2).sum(axis=1, keepdims=True)
    lever = np.divide((t0 - tm) * (t - tm), var, out=np.zeros_like(w), where=var > 0)
    return np.asarray(w / sw * (1.0 + lever * sw), dtype=np.float64)


def local_linear(years: ArrayLike, values: ArrayLike, at: ArrayLike, span: int = 30
                 ) -> FloatArray:
    """Local-linear regression with tricube weights over ``span`` years.

    References
    ----------
    Cleveland, W. S. (1979). Robust locally weighted regression and smoothing
    scatterplots. JASA 74, 829-836 (here without robustness iterations).
    """
    return np.asarray(local_linear_weights(years, at, span) @ np.asarray(values, float),
                      dtype=np.float64)


def _residual_moments(W: FloatArray, pos: NDArray[np.int_], groups: list[NDArray[np.int_]],
                      phi: float) -> tuple[float, float]:
    """Expected residual sum of squares and lag-1 cross-products for unit AR(1) noise.

    Residuals ``r = (I - P W) e`` with ``e`` unit-variance AR(1) (``phi``) within each
    member and independent between members; ``P`` picks each value's year.
    Returns ``E[sum r_i^2]`` and ``E[sum r_i r_(i+1)]`` (pairs within members).
    """
    T = W.shape[0]
    M = np.zeros((T, T))
    diag = 0.0
    lag = 0.0
    cache: dict[tuple[int, ...], tuple[FloatArray, float, float]] = {}
    for idx in groups:
        key = tuple(pos[idx])
        if key not in cache:
            Wj = W[:, idx]
            k = np.arange(len(idx))
            R = phi ** np.abs(k[:, None] - k[None, :])
            G = Wj @ R
            yk = pos[idx]
            tr = float(G[yk, k].sum())
            cross = float(G[yk[:-1], k[1:]].sum() + G[yk[1:], k[:-1]].sum())
            cache[key] = (G @ Wj.T, tr, cross)
        Mj, tr, cross = cache[key]
        M += Mj
        diag += len(idx) - 2.0 * tr
        lag += (len(idx) - 1) * phi - cross
    for idx in groups:
        yk = pos[idx]
        diag += float(M[yk, yk].sum())
        lag += float(M[yk[:-1], yk[1:]].sum())
    return diag, lag


def ar1_noise(years: ArrayLike, values: ArrayLike, members: ArrayLike, span: int = 30
              ) -> tuple[NDArray[np.int_], FloatArray, float, float]:
    """Smooth expectation and AR(1) noise (marginal SD, lag-1) of pooled members.

    The expectation is the local-linear fit of all members pooled
    (:func:`local_linear_weights`). The noise about it is taken as stationary
    AR(1), independent between members. Its lag-1 autocorrelation ``phi`` is the
    value for which the expected ratio of the residuals' lag-1 cross-products
    to their sum of squares, computed exactly through the smoother's weights,
    equals the observed ratio; its variance is the residual sum of squares
    divided by its expectation for unit noise,
    ``tr[(I - H) R(phi) (I - H)']``. For ``phi = 0`` this divides by
    ``n - 2 tr(H) + tr(H'H)``, the residual degrees of freedom of a linear
    smoother (Cleveland & Devlin 1988); with ``phi > 0`` it also restores the
    slow variation that the smoother absorbs. ``phi`` is kept within
    [-0.95, 0.95].

    Parameters
    ----------
    years, values, members
        One entry per member-year; each member's years consecutive.
    span
        Smoother span. [years]

    Returns
    -------
    tuple
        ``(grid_years, expected, sigma, phi)``: expected value on every year
        from the first to the last, the marginal noise SD [unit of values] and
        the lag-1 autocorrelation.

    References
    ----------
    Cleveland, W. S. & Devlin, S. J. (1988). Locally weighted regression. JASA
    83, 596-610 (residual degrees of freedom of a linear smoother).
    """
    y = np.asarray(years, int)
    v = np.asarray(values, float)
    mem = np.asarray(members)
    grid = np.arange(int(y.min()), int(y.max()) + 1)
    W = local_linear_weights(y, grid, span)
    expected = W @ v
    pos = y - grid[0]
    resid = v - expected[pos]
    groups = []
    lag_obs = 0.0
    for m in pd.unique(mem):
        idx = np.flatnonzero(mem == m)
        idx = idx[np.argsort(y[idx], kind="stable")]
        groups.append(idx)
        lag_obs += float(np.sum(resid[idx[:-1]] * resid[idx[1:]]))
    rss = float(np.sum(resid**2))
    if rss <= 1e-18 * max(1.0, float(np.sum(v**2))):
        return grid, expected, 0.0, 0.0
    rho = lag_obs / rss

    def gap(phi: float) -> float:
        d, lg = _residual_moments(W, pos, groups, phi)
        return lg / d - rho

    lo, hi = gap(-PHI_LIMIT), gap(PHI_LIMIT)
    if lo >= 0:
        phi = -PHI_LIMIT
    elif hi <= 0:
        phi = PHI_LIMIT
    else:
        phi = float(brentq(gap, -PHI_LIMIT, PHI_LIMIT, xtol=1e-6))
    d, _ = _residual_moments(W, pos, groups, phi)
    sigma = float(np.sqrt(rss / d)) if d > 0 else 0.0
    return grid, expected, sigma, phi


def cold_probability(expected: ArrayLike, spread: float, cuts: Cuts
                     ) -> tuple[FloatArray, FloatArray]:
    """P(cold) and P(warm) for each expected value under Gaussian spread ``spread``."""
    m = np.asarray(expected, float)
    if spread > 0:
        p_low = ndtr((cuts.low - m) / spread)
        p_high = ndtr((m - cuts.high) / spread)
    else:
        p_low = (m < cuts.low).astype(float)
        p_high = (m > cuts.high).astype(float)
    if cuts.direction == "lower":
        return p_low, p_high
    return p_high, p_low


def classify_values(values: ArrayLike, cuts: Cuts) -> NDArray[np.str_]:
    """Class of each value under the cut values."""
    v = np.asarray(values, float)
    low_cls, high_cls = ("cold", "warm") if cuts.direction == "lower" else ("warm", "cold")
    return np.where(v < cuts.low, low_cls, np.where(v > cuts.high, high_cls, "average"))


QUAD_NODES = 160
QUAD_LIMIT = 7.5


def prob_any_cold(p_cold: ArrayLike, window: int = 10, phi: float = 0.0) -> FloatArray:
    """P(at least one cold year) in every window of ``window`` consecutive years.

    Year t is cold when ``Z_t < c_t`` with ``c_t = Phi^-1(P(cold)_t)`` and ``Z`` a
    stationary unit-variance Gaussian AR(1) with lag-1 autocorrelation ``phi``
    (larger-is-colder quantities reduce to this by symmetry). The probability
    of no cold year is the Gaussian orthant probability
    ``P(Z_t >= c_t for all t in the window)``, computed exactly (to quadrature
    precision) through the Markov property: a backward recursion of the
    conditional probability of the remaining years, each integral by
    Gauss-Legendre quadrature on ``[max(c_t, -7.5), 7.5]`` (160 nodes). With
    ``phi = 0`` it is the product ``1 - prod(1 - P(cold))``.

    Parameters
    ----------
    p_cold
        Probability of a cold year in each of consecutive years.
    window
        Window length w. [years]
    phi
        Lag-1 autocorrelation of the year-to-year noise, in (-1, 1).

    Returns
    -------
    numpy.ndarray
        One probability per window start (``len(p_cold) - window + 1`` values).

    References
    ----------
    Genz, A. & Bretz, F. (2009). Computation of Multivariate Normal and t
    Probabilities. Lecture Notes in Statistics 195, Springer (orthant
    probabilities; the Markov recursion is the special case of a banded
    precision matrix).
    """
    pc = np.clip(np.asarray(p_cold, float), 0.0, 1.0)
    n = len(pc)
    starts = n - window + 1
    if starts < 1:
        return np.empty(0)
    if abs(phi) < 1e-12 or window == 1:
        log_none = np.log1p(-np.minimum(pc, 1 - 1e-16))
        csum = np.concatenate([[0.0], np.cumsum(log_none)])
        return np.asarray(1.0 - np.exp(csum[window:] - csum[:-window]), dtype=np.float64)
    c = ndtri(pc)
    lo = np.clip(c, -QUAD_LIMIT, QUAD_LIMIT)
    gx, gw = np.polynomial.legendre.leggauss(QUAD_NODES)
    half = (QUAD_LIMIT - lo)[:, None] / 2.0
    z = lo[:, None] + half * (gx[None, :] + 1.0)           # (n, K) nodes of "not cold"
    wts = half * gw[None, :]                                 # (n, K) weights (0 if empty)
    s = np.sqrt(1.0 - phi**2)
    # kern[t] maps g on year t's nodes to the conditional probability at year t-1's nodes.
    kern = np.exp(-0.5 * ((z[1:, None, :] - phi * z[:-1, :, None]) / s) ** 2) / (
        s * np.sqrt(2.0 * np.pi))                            # (n-1, K, K)
    first = np.arange(starts)
    g = np.ones((starts, QUAD_NODES))
    for j in range(window - 1, 0, -1):
        t = first + j                                        # year whose nodes g lives on
        g = np.einsum("skl,sl->sk", kern[t - 1], wts[t] * g)
    dens = np.exp(-0.5 * z[first] ** 2) / np.sqrt(2.0 * np.pi)
    none = np.sum(wts[first] * dens * g, axis=1)
    return np.asarray(np.clip(1.0 - none, 0.0, 1.0), dtype=np.float64)


def stop_year(years: ArrayLike, p_cold: ArrayLike, window: int = 10, p: float = 0.1,
              phi: float = 0.0) -> int | None:
    """First window start from which cold years stay unlikely (see the module notes).

    Parameters
    ----------
    years
        Consecutive years.
    p_cold
        Probability of a cold year in each year.
    window
        Window length w.
    p
        Threshold on the probability of at least one cold year in a window.
    phi
        Lag-1 autocorrelation of the year-to-year noise (0: independent years).

    Returns
    -------
    int or None
        The stop year, or None when there is none by the end. The first year
        itself means cold years were unlikely from the start (see
        :func:`stop_state`).
    """
    y = np.asarray(years, int)
    if len(y) < window:
        return None
    below = prob_any_cold(p_cold, window, phi) < p
    ok_from = np.flatnonzero(~below)
    start = 0 if len(ok_from) == 0 else int(ok_from[-1]) + 1
    return int(y[start]) if start < len(below) else None


def stop_state(first_year: int, stop: int | None) -> str:
    """``stopped``, ``not_by_end`` (no stop year) or ``never_cold`` (stop at the first year)."""
    if stop is None:
        return "not_by_end"
    return "never_cold" if stop <= first_year else "stopped"


def check_calibration(n_years: int, calibration: tuple[int, int], explicit: bool,
                      accept_short: bool) -> None:
    """Refuse a bias adjustment calibrated on fewer than 20 shared years.

    Parameters
    ----------
    n_years
        Years in the calibration period with both an observed value and model values.
    calibration
        The period (A, B).
    explicit
        Whether the period was given with ``--calibration``.
    accept_short
        ``--short-calibration``: the user accepts fewer years (recorded in the output).
    """
    if n_years >= MIN_CALIBRATION_YEARS or (explicit and accept_short):
        return
    raise TooFewDataError(
        f"The observed record and the trajectories overlap in {n_years} years "
        f"({calibration[0]}-{calibration[1]}); the bias adjustment needs at least "
        f"{MIN_CALIBRATION_YEARS} calibration years: extend the observed series or start the "
        "trajectories earlier, or, to accept fewer, give {option} A-B with {other}.",
        option=("project", "calibration"), other=("project", "short_calibration"))


@dataclass
class ProjectionResult:
    """Outputs of :func:`project`."""

    projection: pd.DataFrame
    emergence: pd.DataFrame
    summaries: list[str]
    calibration: tuple[int, int]
    calibration_years: int = 0
    short_calibration: bool = False


def _ensemble_median(stops: FloatArray) -> tuple[str, float, float]:
    """Median of stop years with -inf (never cold) and +inf (not by the end).

    Returns the state (``stopped``, ``not_by_end``, ``never_cold`` or
    ``undetermined`` when the two middle values of an even count straddle a
    censored end) and the two middle values.
    """
    s = np.sort(stops)
    n = len(s)
    a, b = s[(n - 1) // 2], s[n // 2]
    if np.isfinite(a) and np.isfinite(b):
        return "stopped", a, b
    if a == b:
        return ("not_by_end" if a > 0 else "never_cold"), a, b
    return "undetermined", a, b


def _ensemble_sentence(scenario: str, stops: FloatArray, end: int, marks: tuple[int, ...]
                       ) -> tuple[str, dict]:
    n = len(stops)
    state, a, b = _ensemble_median(stops)
    finite = stops[np.isfinite(stops)]
    n_stop, n_never = len(finite), int(np.sum(stops == -np.inf))
    n_not = int(np.sum(stops == np.inf))
    by = {m: int(np.sum(stops <= m)) for m in marks}
    lo = int(finite.min()) if len(finite) else None
    hi = int(finite.max()) if len(finite) else None
    parts = []
    if n_stop:
        parts.append(f"{n_stop} of {n} models stop, "
                     + (f"in {lo}" if lo == hi else f"{lo}–{hi}"))
    if n_never:
        parts.append(f"{n_never} never cold in their record")
    if n_not:
        parts.append(f"{n_not} not by {end}")
    counts = "; ".join(f"{by[m]} of {n} by {m}" for m in marks)
    detail = f"{'; '.join(parts)}; {counts}"
    if state == "stopped":
        med = int(round((a + b) / 2))
        text = f"cold years stop being expected around {med} (ensemble median; {detail})."
    elif state == "not_by_end":
        med = None
        text = (f"cold years do not stop being expected by {end} in most models "
                f"({detail}).")
    elif state == "never_cold":
        med = None
        text = (f"cold years are unlikely throughout the record in most models ({detail}).")
    else:
        med = None
        side = (f"after {int(a)}" if np.isfinite(a) else
                f"before {int(b)}" if np.isfinite(b) else "anywhere")
        text = (f"the models split evenly, so the ensemble median is only known to lie "
                f"{side} ({detail}).")
    row = {"model": "ensemble median", "scenario": scenario, "last_cold_year": None,
           "stop_year": med, "stopped": state == "stopped", "state": state, "spread": None,
           "lag1": None, "models": n, "models_stopped": n_stop,
           "models_never_cold": n_never, "stop_year_min": lo,
           "stop_year_max": hi if n_not == 0 else None}
    return f"Under scenario {scenario}, " + text, row


def project(traj: pd.DataFrame, obs_years: ArrayLike, obs_values: ArrayLike, cuts: Cuts,
            options: ProjectOptions, bound: float | None = None,
            milestones: tuple[int, ...] = (2050, 2075)) -> ProjectionResult:
    """Adjust, classify and find the stop year for every model and scenario.

    Parameters
    ----------
    traj
        From :func:`trajectory_frame`.
    obs_years, obs_values
        The observed series.
    cuts
        The fixed cut values of the observed column.
    options
        Projection settings.
    bound
        Domain area for bounded (area) columns; None for temperatures.
    milestones
        Years for the "N of M models stopped by" counts (the end year is added).

    Returns
    -------
    ProjectionResult
        ``projection.csv``, ``emergence.csv`` and one sentence per scenario.
    """
    oy = np.asarray(obs_years, int)
    ov = np.asarray(obs_values, float)
    finite = oy[np.isfinite(ov)]
    cal = options.calibration or (int(max(finite.min(), traj["year"].min())),
                                  int(min(finite.max(), traj["year"].max())))
    if cal[0] > cal[1] or traj["year"].max() < cal[0] or traj["year"].min() > cal[1]:
        raise InputError(f"The trajectories ({traj['year'].min()}-{traj['year'].max()}) do not "
                         f"overlap the calibration period {cal[0]}-{cal[1]}; choose "
                         "{option} within both records.", option=("project", "calibration"))
    model_years = set(traj["year"].tolist())
    n_cal = int(sum(1 for y in finite if cal[0] <= y <= cal[1] and y in model_years))
    adjusting = options.adjust != "none" or options.adjusted_upstream != "none"
    if adjusting:
        check_calibration(n_cal, cal, options.calibration is not None,
                          options.short_calibration)
    short = adjusting and n_cal < MIN_CALIBRATION_YEARS
    rows = []
    emergence = []
    end = int(traj["year"].max())
    for (model, scenario), g in traj.groupby(["model", "scenario"], sort=True):
        parts = []
        for _, gm in g.groupby("member", sort=True):
            adj = adjust_series(gm["year"], gm["value"], oy, ov, options.adjust, cal, bound,
                                options.qdm_window)
            parts.append(gm.assign(value_adjusted=adj))
        gg = pd.concat(parts)
        years, expected, spread, phi = ar1_noise(gg["year"], gg["value_adjusted"],
                                                 gg["member"], options.span)
        if spread < 1e-9 * max(1.0, float(np.abs(expected).max())):
            spread, phi = 0.0, 0.0
        p_cold, p_warm = cold_probability(expected, spread, cuts)
        pc = pd.Series(p_cold, index=years)
        pw = pd.Series(p_warm, index=years)
        gg = gg.assign(cls=classify_values(gg["value_adjusted"], cuts))
        is_cold = (gg["cls"] == "cold").groupby(gg["year"]).mean().reindex(years)
        freq = is_cold.rolling(options.window).mean().shift(-(options.window - 1))
        gg = gg.assign(p_cold=pc.loc[gg["year"]].to_numpy(), p_warm=pw.loc[gg["year"]].to_numpy(),
                       cold_freq_window=freq.loc[gg["year"]].to_numpy())
        rows.append(gg)
        sy = stop_year(years, p_cold, options.window, options.p_stop, phi)
        state = stop_state(int(years[0]), sy)
        cold_years = gg.loc[gg["cls"] == "cold", "year"]
        emergence.append({"model": model, "scenario": scenario,
                          "last_cold_year": int(cold_years.max()) if len(cold_years) else None,
                          "stop_year": sy if state == "stopped" else None,
                          "stopped": state == "stopped", "state": state, "spread": spread,
                          "lag1": phi})
    proj = pd.concat(rows).rename(columns={"cls": "class"})
    proj = proj[["model", "scenario", "member", "year", "value", "value_adjusted", "class",
                 "p_cold", "p_warm", "cold_freq_window"]].reset_index(drop=True)
    em = pd.DataFrame(emergence)
    summaries = []
    ens_rows = []
    marks = tuple(sorted({*milestones, end}))
    for scenario, g in em.groupby("scenario", sort=True):
        stops = np.array([float(s) if st == "stopped" else (np.inf if st == "not_by_end"
                                                            else -np.inf)
                          for s, st in zip(g["stop_year"], g["state"], strict=True)])
        sentence, row = _ensemble_sentence(str(scenario), stops, end, marks)
        summaries.append(sentence)
        ens_rows.append(row)
    em_out = pd.concat([em, pd.DataFrame(ens_rows)], ignore_index=True)
    em_out["calibration_start"] = cal[0]
    em_out["calibration_end"] = cal[1]
    em_out["calibration_years"] = n_cal
    em_out["short_calibration"] = short
    cols = [c.name for c in EMERGENCE_COLUMNS]
    em_out = em_out.reindex(columns=cols)
    for c in ("last_cold_year", "stop_year", "models", "models_stopped", "models_never_cold",
              "stop_year_min", "stop_year_max", "calibration_start", "calibration_end",
              "calibration_years"):
        em_out[c] = em_out[c].astype("Int64")
    em_out["stopped"] = em_out["stopped"].astype(bool)
    em_out["short_calibration"] = em_out["short_calibration"].astype(bool)
    return ProjectionResult(projection=proj, emergence=em_out, summaries=summaries,
                            calibration=cal, calibration_years=n_cal,
                            short_calibration=short)
