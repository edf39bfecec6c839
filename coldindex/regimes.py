"""Regime shifts: STARS and penalised change points, each shift with a family-wise p-value.

Both detectors run on the series as given (``prewhiten='none'``, the default)
or on a prewhitened copy. Significance comes from a parametric red-noise
bootstrap of the *whole detection*: fit AR(1) to the series, simulate null
series of the same length, run the same detector with the same settings and
the same optimiser on each, and record the largest shift statistics found in
it (0 when none). A detected shift's p-value is the share of null series whose
statistics are at least as extreme as its own: a family-wise p-value over all
shifts the detector might report.

Each detected shift gets two t statistics (:func:`shift_t_statistics`), each
the t of a step in a mean-shift model with AR(1) errors fitted by feasible GLS
(Prais-Winsten, rho estimated from that model's own residuals;
:func:`gls_step_t`):

* the *local* t: the step at the shift in the model with steps at the shift
  and at its neighbouring shifts, i.e. the contrast of the regimes either side;
* the *whole-record* t: the step in the model with that one step, the record
  before the shift against the record after it (the Chow test at the detected
  break, with AR(1) errors).

They are combined by their smaller bootstrap p-value, itself calibrated against
the null's smaller p-values (min-p, Westfall & Young 1993): the null runs
exactly the same detector and the same pair of statistics, so the family-wise
level holds whichever of the two carries the evidence. Why two: in red noise
both detectors split the record into several short regimes (STARS reports a
shift in about 95 % of pure AR(1) 0.5 series of 50 years, PELT in 88 %), so the
regimes either side of a real shift are short and the local contrast weak,
while the whole-record contrast uses every year; but a temporary regime (a
step up and back down) is invisible to a before/after contrast of the whole
record and needs the local one. With rho estimated inside each model, a step no
longer inflates the persistence the statistic assumes. The earlier statistic,
the two-sample t of the adjacent regimes with effective sizes
(:func:`shift_statistics`), is kept for comparison in the benchmark
(benchmarks/README.md has the size and power of both).

rho of the null's AR(1) is the median of Marriott-Pope-Kendall corrected
lag-1 estimates over all ``null_window``-long stretches (default 15 years): the
whole-series estimate grows with a step (0.51 instead of 0 for a 2-SD step in
50 years of white noise) and would make the null so red that larger steps
become less significant.

Random streams are keyed by the detector's *name* (:func:`method_rng`), so a
method's p-values do not depend on which other methods run. A shift whose first
year lies within the last ``cutoff`` years of the record is marked
``provisional``: fewer than a cut-off length of the new regime has been seen,
and it may move or vanish as years are added.

STARS choices, following Rodionov (2004):

* sigma_l^2 is the average of the variances (ddof = 1) of all l-long windows;
* ``diff = t(1 - alpha/2, 2l - 2) * sqrt(2 sigma_l^2 / l)``;
* the first regime's mean is that of the first l values, and the search starts
  at the (l + 1)-th value;
* the regime shift index RSI is ``sum((x_j - level) / (l sigma_l))`` over up to
  l values; its denominator stays ``l sigma_l`` near the end of the series,
  where fewer than l values remain;
* a regime's mean uses at least its first l values (fewer only at the end) and
  grows as values are added; with Huber weighting (parameter H, in units of
  sigma_l) one reweighting step gives values farther than ``H sigma_l`` from the
  plain mean the weight ``H sigma_l / |x - mean|`` (Rodionov 2006).

References
----------
Chow, G. C. (1960). Tests of equality between sets of coefficients in two linear
regressions. Econometrica 28, 591-605.
Prais, S. J. & Winsten, C. B. (1954). Trend estimators and serial correlation.
Cowles Commission Discussion Paper 383.
Westfall, P. H. & Young, S. S. (1993). Resampling-Based Multiple Testing.
Wiley.
Worsley, K. J. (1979). On the likelihood ratio test for a shift in location of
normal populations. J. Am. Stat. Assoc. 74, 365-367.
Bretherton, C. S., Widmann, M., Dymnikov, V. P., Wallace, J. M. & Bladé, I.
(1999). The effective number of spatial degrees of freedom of a time-varying
field. J. Climate 12, 1990-2009, eq. 30.
Rodionov, S. N. (2004). A sequential algorithm for testing climate regime
shifts. Geophys. Res. Lett. 31, L09204.
Rodionov, S. N. (2006). Use of prewhitening in climate regime shift
detection. Geophys. Res. Lett. 33, L12707.
"""

from __future__ import annotations

import functools
import hashlib
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from numpy.lib.stride_tricks import sliding_window_view
from numpy.typing import ArrayLike, NDArray
from scipy import stats as sps

from coldindex.config import ShiftsConfig
from coldindex.errors import InputError, TooFewDataError
from coldindex.schema import REGIMES, SHIFTS
from coldindex.stats import lag1_autocorrelation, lag1_subsample_median, simulate_ar1

FloatArray = NDArray[np.float64]
METHODS = ("stars", "pelt")
SHIFT_COLUMNS = list(SHIFTS.names)  # method, year, means, t_stat, p_value, rsi, provisional


def _huber_mean(x: FloatArray, sigma: float, huber: float) -> float:
    m = float(x.sum()) / len(x)
    dev = np.abs(x - m)
    lim = huber * sigma
    if lim <= 0 or not float(dev.max()) > lim:
        return m
    w = np.where(dev > lim, lim / np.maximum(dev, 1e-300), 1.0)
    return float(np.dot(w, x) / w.sum())


@functools.lru_cache(maxsize=64)
def _t_quantile(q: float, dof: int) -> float:
    return float(sps.t.ppf(q, dof))


def stars(x: ArrayLike, cutoff: int = 10, alpha: float = 0.1, huber: float = 1.0
          ) -> tuple[list[int], list[float]]:
    """Sequential t-test analysis of regime shifts (STARS).

    Parameters
    ----------
    x
        Series without gaps.
    cutoff
        Cut-off length l: the shortest regime the method aims to detect.
    alpha
        Significance level of the t-test that sets the threshold ``diff``.
    huber
        Huber weight parameter H (units of sigma_l); ``inf`` for plain means.

    Returns
    -------
    tuple
        Indices where new regimes start, and their RSI values.

    References
    ----------
    Rodionov, S. N. (2004). A sequential algorithm for testing climate regime
    shifts. Geophys. Res. Lett. 31, L09204.
    Rodionov, S. N. (2006). Use of prewhitening in climate regime shift
    detection. Geophys. Res. Lett. 33, L12707.
    """
    v = np.asarray(x, float)
    n, ell = len(v), int(cutoff)
    if n < 2 * ell:
        raise TooFewDataError(f"STARS needs a series at least twice the cut-off length "
                              f"({2 * ell} values), got {n}; lower {{option}}.",
                              option=("shifts", "cutoff"))
    sigma2 = float(sliding_window_view(v, ell).var(axis=1, ddof=1).mean())
    sigma = np.sqrt(sigma2)
    if sigma == 0:
        return [], []
    diff = _t_quantile(1 - alpha / 2, 2 * ell - 2) * np.sqrt(2 * sigma2 / ell)
    scale = ell * sigma
    vals = v.tolist()
    start = 0
    mean = _huber_mean(v[:ell], sigma, huber)
    shifts: list[int] = []
    rsis: list[float] = []
    for i in range(ell, n):
        xi = vals[i]
        if xi > mean + diff or xi < mean - diff:
            sign = 1.0 if xi > mean else -1.0
            level = mean + sign * diff
            rsi = 0.0
            for j in range(i, min(i + ell, n)):
                rsi += sign * (vals[j] - level) / scale
                if rsi < 0:
                    break
            if rsi >= 0:
                shifts.append(i)
                rsis.append(rsi)
                start = i
                mean = _huber_mean(v[i:i + ell], sigma, huber)
                continue
        if i >= start + ell:
            mean = _huber_mean(v[start:i + 1], sigma, huber)
    return shifts, rsis


def pelt_penalty(x: ArrayLike) -> float:
    """BIC-type penalty ``2 sigma^2 ln(n)`` with a robust noise variance.

    sigma is the median absolute deviation of the first differences, scaled by
    1.4826 / sqrt(2) (Gaussian consistency; differencing doubles the variance),
    so level shifts do not inflate it.
    """
    v = np.asarray(x, float)
    d = np.diff(v)
    s = 1.4826 * float(np.median(np.abs(d - np.median(d)))) / np.sqrt(2.0)
    if s == 0:
        s = float(np.std(v, ddof=1)) or 1.0
    return 2.0 * s * s * float(np.log(len(v)))


def pelt(x: ArrayLike, min_size: int = 5, penalty: float | None = None) -> list[int]:
    """Penalised least-squares change points: the PELT objective, solved exactly.

    Minimises the sum over segments of the squared deviations from the segment
    mean plus ``penalty`` per change point, every break position allowed (no
    ``jump`` restriction). The optimum is found by the optimal-partitioning
    dynamic programme (:func:`optimal_partition_batch`), the same code that
    segments the bootstrap's null series, so data and null share one optimiser.
    (ruptures' ``Pelt(jump=1)`` solves the same problem, but returned a
    non-optimal segmentation for 0.5-1 % of short series: tests/test_regimes.py.)

    Parameters
    ----------
    x
        Series without gaps.
    min_size
        Shortest regime, in values.
    penalty
        Penalty per change point; default :func:`pelt_penalty`.

    Returns
    -------
    list
        Indices where new regimes start.

    References
    ----------
    Killick, R., Fearnhead, P. & Eckley, I. A. (2012). Optimal detection of
    changepoints with a linear computational cost. JASA 107, 1590-1598.
    Jackson, B. et al. (2005). An algorithm for optimal partitioning of data on
    an interval. IEEE Signal Process. Lett. 12, 105-108.
    """
    v = np.asarray(x, float)
    pen = pelt_penalty(v) if penalty is None else penalty
    return optimal_partition_batch(v[None, :], [pen], min_size)[0]


def segmentation_cost(x: ArrayLike, starts: list[int], penalty: float) -> float:
    """Penalised least-squares cost of a segmentation (the objective of :func:`pelt`)."""
    v = np.asarray(x, float)
    edges = [0, *starts, len(v)]
    rss = sum(float(np.sum((v[a:b] - v[a:b].mean()) ** 2))
              for a, b in zip(edges[:-1], edges[1:], strict=True))
    return rss + penalty * len(starts)


def optimal_partition_batch(X: ArrayLike, penalties: ArrayLike, min_size: int
                            ) -> list[list[int]]:
    """Exact penalised least-squares segmentation of many series at once.

    The optimal-partitioning dynamic programme (Jackson et al. 2005) that PELT
    solves with pruning, vectorised across series: the same optimum as
    :func:`pelt`, fast enough for bootstrap nulls.

    Parameters
    ----------
    X
        Series, (B, n).
    penalties
        Penalty per change point for each series, (B,).
    min_size
        Shortest segment.

    Returns
    -------
    list
        For each series, the indices where new segments start.
    """
    X = np.atleast_2d(np.asarray(X, float))
    B, n = X.shape
    pen = np.asarray(penalties, float).reshape(B)
    c1 = np.concatenate([np.zeros((B, 1)), np.cumsum(X, axis=1)], axis=1)
    c2 = np.concatenate([np.zeros((B, 1)), np.cumsum(X * X, axis=1)], axis=1)
    F = np.full((B, n + 1), np.inf)
    F[:, 0] = -pen
    back = np.zeros((B, n + 1), dtype=int)
    for t in range(min_size, n + 1):
        s = np.array([0] + list(range(min_size, t - min_size + 1)))
        length = (t - s)[None, :]
        seg = (c2[:, t][:, None] - c2[:, s]) - (c1[:, t][:, None] - c1[:, s]) ** 2 / length
        total = F[:, s] + seg + pen[:, None]
        k = np.argmin(total, axis=1)
        F[:, t] = total[np.arange(B), k]
        back[:, t] = s[k]
    out = []
    for b in range(B):
        cps, t = [], n
        while t > 0:
            t = int(back[b, t])
            if t > 0:
                cps.append(t)
        out.append(sorted(cps))
    return out


def _segment_means(v: FloatArray, starts: list[int]) -> list[float]:
    edges = [0, *starts, len(v)]
    return [float(np.mean(v[a:b])) for a, b in zip(edges[:-1], edges[1:], strict=True)]


def lag1_rows(X: ArrayLike, window: int = 15) -> FloatArray:
    """:func:`coldindex.stats.lag1_subsample_median` of every row of X, vectorised.

    Parameters
    ----------
    X
        Series, (B, n).
    window
        Length of the stretches.

    Returns
    -------
    numpy.ndarray
        One shift-robust lag-1 estimate per row, (B,).
    """
    X = np.atleast_2d(np.asarray(X, float))
    m = min(int(window), X.shape[1])
    if m < 5:
        return np.array([lag1_subsample_median(x, window) for x in X])
    W = sliding_window_view(X, m, axis=1)
    d = W - W.mean(axis=2, keepdims=True)
    den = np.sum(d * d, axis=2)
    num = np.sum(d[..., :-1] * d[..., 1:], axis=2)
    r = np.divide(num, den, out=np.zeros_like(num), where=den != 0)
    return np.median(np.clip((m * r + 1.0) / (m - 3.0), -0.99, 0.99), axis=1)


def shift_statistics(v: ArrayLike, starts: list[int], rho: float) -> FloatArray:
    """Two-sample t of each shift, with the regimes' effective sizes (the earlier statistic).

    No longer the test's statistic (:func:`shift_t_statistics` replaced it); kept so
    the benchmark and the tests can compare the two on the same detections.
    For the shift between regimes a (before) and b (after),
    ``|mean_b - mean_a| / (s sqrt(1/n_a' + 1/n_b'))``, where s is the pooled
    within-regime standard deviation of the whole segmentation (ddof = number
    of regimes) and ``n' = n (1 - rho) / (1 + rho)`` the effective size of a
    regime (Bretherton et al. 1999, eq. 30, with rho clipped to [-0.9, 0.9] and
    no other bound). With rho = 0 this is the two-sample t whose maximum over
    the split points is the likelihood-ratio statistic for one shift in a
    normal mean (Worsley 1979).

    Parameters
    ----------
    v
        The series the detector saw.
    starts
        Indices where new regimes start.
    rho
        Lag-1 autocorrelation of the series (:func:`lag1_rows`).

    Returns
    -------
    numpy.ndarray
        One statistic per shift (infinite for a step between constant regimes).

    References
    ----------
    Worsley, K. J. (1979). On the likelihood ratio test for a shift in location
    of normal populations. J. Am. Stat. Assoc. 74, 365-367.
    Bretherton, C. S., Widmann, M., Dymnikov, V. P., Wallace, J. M. & Bladé, I.
    (1999). J. Climate 12, 1990-2009, eq. 30.
    """
    x = np.asarray(v, float)
    if not starts:
        return np.zeros(0)
    edges = np.array([0, *starts, len(x)])
    sizes = np.diff(edges)
    means = np.add.reduceat(x, edges[:-1]) / sizes
    resid = x - np.repeat(means, sizes)
    dof = len(x) - len(sizes)
    s = float(np.sqrt(resid @ resid / dof)) if dof > 0 else 0.0
    r = float(np.clip(rho, -0.9, 0.9))
    inflation = (1.0 + r) / (1.0 - r)  # n / n'
    step = np.abs(np.diff(means))
    se = s * np.sqrt(inflation * (1.0 / sizes[:-1] + 1.0 / sizes[1:]))
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(step > 0, step / se, 0.0)


def gls_step_t(Y: ArrayLike, steps: ArrayLike, target: ArrayLike, rho: float | None = None,
               iterations: int = 3) -> tuple[FloatArray, FloatArray]:
    """Feasible-GLS t of one step in a mean-shift model with AR(1) errors, batched.

    Each row m is the model ``y_t = mu + sum_k delta_k 1[t >= steps_k] + e_t`` with
    ``e_t = rho e_{t-1} + u_t``, fitted by iterated Prais-Winsten GLS: ordinary least
    squares, then ``iterations`` rounds of (rho from the lag-1 autocorrelation r of the
    residuals, bias-corrected to ``(n r + k) / (n - k - 2)`` for k estimated levels
    and clipped to [-0.9, 0.9]; Prais-Winsten transform; least squares again). The t
    is ``|delta_target| / se`` with the usual GLS standard error
    (``s^2 (X*'X*)^-1``, s^2 on n - k degrees of freedom).

    The bias correction is Marriott-Pope-Kendall's ``(n r + 1) / (n - 3)`` with one
    mean-removal term per estimated level (From memory: each removed segment mean
    lowers r by about (1 + rho) / n, as the one mean does in Kendall 1954); the
    bootstrap calibrates what is left.

    Parameters
    ----------
    Y
        Series, (M, n).
    steps
        Step positions (first index of each new level), (M, K); ``n`` marks an unused
        slot.
    target
        Which of the K steps each row tests, (M,).
    rho
        A known lag-1 autocorrelation in place of the estimate (benchmarks).
    iterations
        Rounds of rho estimation and Prais-Winsten fits.

    Returns
    -------
    tuple
        The t of each row's target step (infinite for a step between constant
        levels), and the rho of its last fit, both (M,).

    References
    ----------
    Prais, S. J. & Winsten, C. B. (1954). Trend estimators and serial correlation.
    Cowles Commission Discussion Paper 383.
    Chow, G. C. (1960). Tests of equality between sets of coefficients in two linear
    regressions. Econometrica 28, 591-605.
    Marriott, F. H. C. & Pope, J. A. (1954); Kendall, M. G. (1954). Biometrika 41.
    """
    Yv = np.atleast_2d(np.asarray(Y, float))
    S = np.atleast_2d(np.asarray(steps, dtype=int))
    tgt = np.asarray(target, dtype=int).reshape(len(Yv))
    M, n = Yv.shape
    if M == 0:
        return np.zeros(0), np.zeros(0)
    D = np.concatenate([np.ones((M, 1, n)),
                        (np.arange(n)[None, None, :] >= S[:, :, None]).astype(float)], axis=1)
    unused = np.concatenate([np.zeros((M, 1), bool), S >= n], axis=1)
    k = (~unused).sum(axis=1)
    pad = np.einsum("mp,pq->mpq", unused.astype(float), np.eye(D.shape[1]))

    def fit(Dm: FloatArray, y: FloatArray) -> tuple[FloatArray, FloatArray]:
        inv = np.linalg.inv(Dm @ Dm.transpose(0, 2, 1) + pad)
        return np.einsum("mpq,mqn,mn->mp", inv, Dm, y), inv

    beta, inv = fit(D, Yv)
    Ds, ys = D, Yv
    r = np.zeros(M)
    for _ in range(1 if rho is not None else iterations):
        if rho is None:
            e = Yv - np.einsum("mp,mpn->mn", beta, D)
            den = np.sum(e * e, axis=1)
            num = np.sum(e[:, :-1] * e[:, 1:], axis=1)
            r1 = np.divide(num, den, out=np.zeros(M), where=den > 0)
            r = np.clip((n * r1 + k) / np.maximum(n - k - 2.0, 1.0), -0.9, 0.9)
        else:
            r = np.full(M, float(rho))
        w = np.sqrt(1.0 - r * r)
        Ds = np.concatenate([w[:, None, None] * D[:, :, :1],
                             D[:, :, 1:] - r[:, None, None] * D[:, :, :-1]], axis=2)
        ys = np.concatenate([w[:, None] * Yv[:, :1], Yv[:, 1:] - r[:, None] * Yv[:, :-1]],
                            axis=1)
        beta, inv = fit(Ds, ys)
    res = ys - np.einsum("mp,mpn->mn", beta, Ds)
    s2 = np.sum(res * res, axis=1) / np.maximum(n - k, 1)
    rows = np.arange(M)
    step = np.abs(beta[rows, 1 + tgt])
    se = np.sqrt(s2 * inv[rows, 1 + tgt, 1 + tgt])
    # Levels constant to rounding leave no noise to measure: a step between them is
    # infinitely significant, no step is not significant.
    tiny = 1e-12 * np.maximum(np.abs(Yv).max(axis=1), 1e-300)
    with np.errstate(divide="ignore", invalid="ignore"):
        t = np.where(step > tiny, np.where(np.sqrt(s2) > tiny, step / se, np.inf), 0.0)
    return np.asarray(t, float), r


def shift_t_statistics(X: ArrayLike, starts: list[list[int]], rho: float | None = None
                       ) -> tuple[list[FloatArray], list[FloatArray]]:
    """Local and whole-record t of every detected shift, under AR(1) errors.

    For the shift at b, with a and c the detector's neighbouring shifts (when there are
    any):

    * **local** t: the step at b in the model with steps at a, b and c, so the
      contrast is between the regimes either side of b, the rest of the record only
      informing the noise and rho; it keeps a temporary regime's shifts visible;
    * **whole-record** t: the step at b in the model with that one step: the record
      before b against the record after it (a Chow test with AR(1) errors at the
      detected break), which does not lose power when a detector splits red noise
      into short regimes either side of a real shift.

    Both by :func:`gls_step_t` (all shifts of all rows in one batch); the bootstrap
    combines them by their smaller p-value (:func:`combined_p_values`).

    Parameters
    ----------
    X
        Series, (B, n).
    starts
        For each row, the indices where new regimes start.
    rho
        A known lag-1 autocorrelation in place of the estimates (benchmarks).

    Returns
    -------
    tuple
        For each row, the local t of its shifts and the whole-record t of its shifts.
    """
    X = np.atleast_2d(np.asarray(X, float))
    n = X.shape[1]
    row, steps, target = [], [], []
    for i, st in enumerate(starts):
        for j, b in enumerate(st):
            near = [q for q in (st[j - 1] if j > 0 else n, b,
                                st[j + 1] if j + 1 < len(st) else n)]
            row += [i, i]
            steps += [near, [b, n, n]]
            target += [1, 0]
    t, _ = gls_step_t(X[row] if row else np.zeros((0, n)),
                      np.array(steps, dtype=int).reshape(-1, 3), target, rho)
    local, record, pos = [], [], 0
    for st in starts:
        seg = t[pos:pos + 2 * len(st)]
        local.append(seg[0::2])
        record.append(seg[1::2])
        pos += 2 * len(st)
    return local, record


def combined_p_values(stats: ArrayLike, null: ArrayLike) -> FloatArray:
    """Bootstrap p-values of several statistics at once, by their smallest p (min-p).

    Each column of ``stats`` (one row per shift) gets its bootstrap p against the
    same column of ``null`` (:func:`p_values`); a shift's combined p is
    ``(1 + #{null min-p <= its min-p}) / (B + 1)``, where a null series' min-p is the
    smallest of its columns' p-values, each ranked among the other null series and the
    shift itself (so the B + 1 draws are exchangeable under the null). This
    calibrates the choice of the better of the statistics, so the family-wise level
    holds whichever column carries the evidence.

    Parameters
    ----------
    stats
        (k, J) statistics of k shifts.
    null
        (B, J) statistics of the null series (the largest of each column per series).

    Returns
    -------
    numpy.ndarray
        (k,) combined p-values.

    References
    ----------
    Westfall, P. H. & Young, S. S. (1993). Resampling-Based Multiple Testing. Wiley,
    ch. 2 (the min-p adjustment).
    """
    T = np.atleast_2d(np.asarray(stats, float))
    Z = np.atleast_2d(np.asarray(null, float))
    B, J = Z.shape
    if T.size == 0:
        return np.zeros(0)
    p_data = np.min([p_values(T[:, j], Z[:, j]) for j in range(J)], axis=0)
    # Each null series ranked among the other null series and the shift itself, so the
    # B + 1 draws are exchangeable under the null: (1 + #{others >= its value}) / (B + 1).
    p_null = np.full((len(T), B), np.inf)
    for j in range(J):
        others = p_values(Z[:, j], Z[:, j]) * (B + 1) - 1.0  # 1 + #{other null >= z}
        shift_above = T[:, j][:, None] >= Z[:, j][None, :] * (1 - 1e-12)
        p_null = np.minimum(p_null, (others[None, :] + shift_above) / (B + 1.0))
    below = np.sum(p_null <= p_data[:, None] * (1 + 1e-12), axis=1)
    return np.asarray((1.0 + below) / (B + 1.0), dtype=np.float64)


def prewhiten(x: ArrayLike, method: str, subsample: int) -> tuple[FloatArray, float]:
    """Remove red noise ``x_t - rho x_{t-1}`` with a subsample estimate of rho.

    rho is the median over all ``subsample``-long windows of a bias-corrected
    lag-1 estimate: ``mpk`` (Marriott-Pope-Kendall, ``(m r + 1)/(m - 3)``) or
    ``ip4`` (bias taken as inversely proportional to the length, refined by four
    fixed-point corrections ``rho_{k+1} = r + (1 + 3|rho_k|) / m``). The result
    has one value fewer than the input.

    References
    ----------
    Rodionov, S. N. (2006). Use of prewhitening in climate regime shift
    detection. Geophys. Res. Lett. 33, L12707.
    """
    v = np.asarray(x, float)
    m = max(int(subsample), 5)
    rs = np.array([lag1_autocorrelation(w) for w in sliding_window_view(v, m)])
    if method == "mpk":
        est = (m * rs + 1.0) / (m - 3.0)
    else:
        est = rs + 1.0 / m
        for _ in range(4):
            est = rs + (1.0 + 3.0 * np.abs(est)) / m
    rho = float(np.clip(np.median(est), -0.99, 0.99))
    return v[1:] - rho * v[:-1], rho


def _detect(v: FloatArray, method: str, opts: ShiftsConfig) -> tuple[list[int], list[float]]:
    """One series through a detector: starts of new regimes and (STARS) their RSIs."""
    if method == "stars":
        return stars(v, opts.cutoff, opts.alpha, opts.huber)
    return pelt(v, opts.min_size), []


def detect_rows(X: ArrayLike, method: str, opts: ShiftsConfig) -> list[list[int]]:
    """Run one detector on every row of X (data and null alike).

    PELT rows are segmented together by :func:`optimal_partition_batch`, which
    gives the same breaks as :func:`pelt` row by row (one optimiser for data and
    null); STARS rows one by one.
    """
    X = np.atleast_2d(np.asarray(X, float))
    if method == "pelt":
        return optimal_partition_batch(X, [pelt_penalty(x) for x in X], opts.min_size)
    return [_detect(x, method, opts)[0] for x in X]


def max_shift_statistics(X: ArrayLike, method: str, opts: ShiftsConfig) -> FloatArray:
    """Largest local and largest whole-record t of each row after detection (0 without a shift).

    This is the bootstrap's statistic: applied to null series it gives the null
    distribution of the pair; applied to data, the pair of the series
    (:func:`shift_t_statistics`, each maximum taken over the row's shifts).

    Returns
    -------
    numpy.ndarray
        (B, 2): column 0 the largest local t, column 1 the largest whole-record t.
    """
    X = np.atleast_2d(np.asarray(X, float))
    starts = detect_rows(X, method, opts)
    local, record = shift_t_statistics(X, starts)
    return np.array([[a.max(initial=0.0), b.max(initial=0.0)]
                     for a, b in zip(local, record, strict=True)]).reshape(len(X), 2)


def null_series(n: int, phi: float, opts: ShiftsConfig, rng: np.random.Generator,
                size: int) -> FloatArray:
    """AR(1) null series as the detector would see them (prewhitened when asked).

    Returns
    -------
    numpy.ndarray
        (size, n), or (size, n - 1) after prewhitening.
    """
    null = simulate_ar1(phi, n, size, rng)
    if opts.prewhiten != "none":
        sub = opts.subsample or max(5, (opts.cutoff + 1) // 3)
        null = np.array([prewhiten(s, opts.prewhiten, sub)[0] for s in null])
    return null


def method_rng(seed: int, method: str) -> np.random.Generator:
    """Random stream of one detector's bootstrap, keyed by the detector's name.

    ``SeedSequence([seed, key])`` with key the first 8 bytes of the SHA-256 of
    the name: the stream does not depend on the position of the method in the
    list, nor on which other methods run.
    """
    key = int.from_bytes(hashlib.sha256(method.encode("utf-8")).digest()[:8], "big")
    return np.random.default_rng(np.random.SeedSequence([int(seed), key]))


def p_values(stats: ArrayLike, null: ArrayLike) -> FloatArray:
    """Bootstrap p-values ``(1 + #{null >= t}) / (B + 1)`` of each statistic t.

    The observed statistic counts as one of the B + 1 draws, so no p-value is 0.

    References
    ----------
    Davison, A. C. & Hinkley, D. V. (1997). Bootstrap Methods and their
    Application. Cambridge University Press, ch. 4.
    """
    t = np.asarray(stats, float)
    z = np.sort(np.asarray(null, float))
    above = len(z) - np.searchsorted(z, t * (1 - 1e-12), side="left")
    return np.asarray((1.0 + above) / (len(z) + 1.0), dtype=np.float64)


@dataclass
class ShiftResult:
    """Shifts and regimes found by the detectors.

    Attributes
    ----------
    shifts
        One row a shift (columns :data:`SHIFT_COLUMNS`): ``method``, ``year``
        (first year of the new regime), ``mean_before``, ``mean_after``,
        ``t_stat`` (the local t of :func:`shift_t_statistics`), ``p_value``
        (family-wise, the local and the whole-record t combined by min-p),
        ``rsi`` (STARS only), ``provisional``.
    regimes
        One row a regime: ``method``, ``start``, ``end``, ``mean``, ``n``.
    phi
        Lag-1 autocorrelation of the bootstrap null (:func:`lag1_rows`).
    p_max
        Largest p-value for a shift to survive (:meth:`surviving`).
    prewhiten_rho
        Red-noise coefficient removed by prewhitening (None without).
    skipped_years
        Years without a value inside the series, closed up before detection.
    """

    shifts: pd.DataFrame
    regimes: pd.DataFrame
    phi: float
    p_max: float = 0.05
    prewhiten_rho: float | None = None
    skipped_years: list[int] = field(default_factory=list)

    def surviving(self) -> pd.DataFrame:
        """The shifts whose family-wise p-value is below ``p_max`` (the verdict)."""
        return surviving(self.shifts, self.p_max)


def surviving(shifts: pd.DataFrame, p_max: float) -> pd.DataFrame:
    """Rows of a shifts table whose p-value is below ``p_max`` (a blank p never survives)."""
    return shifts[shifts["p_value"].fillna(1.0) < p_max]


def detect_shifts(years: ArrayLike, values: ArrayLike, methods: tuple[str, ...] = METHODS,
                  opts: ShiftsConfig | None = None) -> ShiftResult:
    """Detect regime shifts with each method and give each its bootstrap p-value.

    Parameters
    ----------
    years, values
        The yearly series. Years must be unique; missing values (NaN) and gap
        years inside the series are closed up and listed in ``skipped_years``.
    methods
        ``stars`` and/or ``pelt``.
    opts
        Detector, bootstrap and verdict settings.

    Returns
    -------
    ShiftResult
        Shifts, regimes and the fitted null.
    """
    opts = opts or ShiftsConfig()
    y = np.asarray(years, dtype=int)
    v = np.asarray(values, float)
    if len(np.unique(y)) != len(y):
        dup = pd.Series(y)[pd.Series(y).duplicated()].iloc[0]
        raise InputError(f"Year {dup} appears more than once in the series; keep one value a "
                         "year.")
    order = np.argsort(y)
    y, v = y[order], v[order]
    ok = np.isfinite(v)
    if ok.sum() == 0:
        raise InputError("The series has no values.")
    first, last = y[ok][0], y[ok][-1]
    skipped = sorted(set(range(int(first), int(last) + 1)) - set(y[ok].tolist()))
    y, v = y[ok], v[ok]
    if np.std(v) == 0:
        raise InputError("The series is constant; there is no shift to detect.")
    phi = float(lag1_rows(v, opts.null_window)[0])
    rho = None
    work = v
    work_years = y
    if opts.prewhiten != "none":
        sub = opts.subsample or max(5, (opts.cutoff + 1) // 3)
        work, rho = prewhiten(v, opts.prewhiten, sub)
        work_years = y[1:]
    shift_rows, regime_rows = [], []
    for method in methods:
        if method not in METHODS:
            raise InputError(f"{{option}} needs to be stars, pelt or both, got: {method!r}.",
                             option=("shifts", "method"))
        starts, rsis = _detect(work, method, opts)
        # The statistics on the series the detector saw; means on the original series.
        local, record = (a[0] for a in shift_t_statistics(work, [starts]))
        starts_v = [int(np.searchsorted(y, work_years[s])) for s in starts]
        means = _segment_means(v, starts_v)
        pvals = np.full(len(starts_v), np.nan)
        if starts_v and opts.boot > 0:
            null = null_series(len(v), phi, opts, method_rng(opts.seed, method), opts.boot)
            pvals = combined_p_values(np.column_stack([local, record]),
                                      max_shift_statistics(null, method, opts))
        for j, s in enumerate(starts_v):
            shift_rows.append({"method": method, "year": int(y[s]), "mean_before": means[j],
                               "mean_after": means[j + 1], "t_stat": float(local[j]),
                               "t_record": float(record[j]), "p_value": float(pvals[j]),
                               "rsi": rsis[j] if rsis else float("nan"),
                               "provisional": bool(y[s] > last - opts.cutoff)})
        edges = [0, *starts_v, len(v)]
        for a, b, mu in zip(edges[:-1], edges[1:], means, strict=True):
            regime_rows.append({"method": method, "start": int(y[a]), "end": int(y[b - 1]),
                                "mean": mu, "n": b - a})
    shifts = pd.DataFrame(shift_rows, columns=SHIFT_COLUMNS).astype({"provisional": bool})
    regimes = pd.DataFrame(regime_rows, columns=list(REGIMES.names))
    return ShiftResult(shifts=shifts, regimes=regimes, phi=phi, p_max=opts.p_max,
                       prewhiten_rho=rho, skipped_years=skipped)


def withdrawn_provisional(previous: pd.DataFrame, current: pd.DataFrame) -> pd.DataFrame:
    """Provisional shifts of an earlier run that the current run no longer reports.

    A shift counts as still there when the current run reports the same method
    and first year (provisional or not); a shift that moved by a year is
    withdrawn at its old year.

    Parameters
    ----------
    previous, current
        ``shifts.csv`` tables of the earlier and the current run. An earlier
        table without a ``provisional`` column (written before the flag
        existed) gives no rows.

    Returns
    -------
    pandas.DataFrame
        The withdrawn rows of ``previous``: ``method``, ``year``,
        ``mean_before``, ``mean_after``.
    """
    cols = ["method", "year", "mean_before", "mean_after"]
    if "provisional" not in previous.columns or previous.empty:
        return pd.DataFrame(columns=cols)
    flag = previous["provisional"].astype(str).str.lower().isin(("true", "1", "1.0"))
    prov = previous[flag]
    now = {(str(m), int(y)) for m, y in zip(current["method"], current["year"], strict=True)}
    gone = [(str(m), int(y)) not in now for m, y in zip(prov["method"], prov["year"],
                                                       strict=True)]
    out = prov[gone][cols].sort_values(["year", "method"], kind="stable")
    return out.reset_index(drop=True).astype({"year": int})
