"""Regime shifts: STARS and penalised change points, each shift with a family-wise p-value.

Both detectors run on the series as given (``prewhiten='none'``, the default)
or on a prewhitened copy. Significance comes from a parametric red-noise
bootstrap of the *whole detection*: fit AR(1) to the series, simulate null
series of the same length, run the same detector with the same settings on
each, and record the largest standardized shift (|mean after - mean before| /
the series' noise scale) found in it (0 when none). A detected shift's p-value
is the share of null series whose largest standardized shift is at least as
large as its own: a family-wise p-value over all shifts the detector might
report.

Two estimates are chosen so that a real step does not hide itself:

* the AR(1) coefficient is the median of Marriott-Pope-Kendall corrected lag-1
  estimates over all ``null_window``-long stretches (default 15 years); the
  whole-series estimate grows with the step (0.67 instead of 0.5 for a 1.5-SD
  step in 50 years) and makes the null so red that larger steps become *less*
  significant (measured: power 4 % at 1.5 SD and 1 % at 3 SD, below the size);
* the scale is the noise scale from first differences (:func:`robust_sd`),
  the same on every series, where the plain SD would grow with the step.

Measured with these choices (benchmarks/README.md): size 7-8 % at p < 0.1 on
AR(1) series (rho = 0.5, n = 50), power 17-19 % for a 1.5-SD step and 46-57 %
for a 3-SD step. A real step still inflates the null somewhat; that, and the
persistence of red noise itself, is the price of not trusting the detector's
own segments.

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
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from numpy.lib.stride_tricks import sliding_window_view
from numpy.typing import ArrayLike, NDArray
from scipy import stats as sps

from coldindex.errors import InputError
from coldindex.stats import (
    lag1_autocorrelation,
    lag1_subsample_median,
    robust_sd,
    simulate_ar1,
)

FloatArray = NDArray[np.float64]
METHODS = ("stars", "pelt")


@dataclass(frozen=True)
class ShiftOptions:
    """Settings of both detectors and of the bootstrap."""

    cutoff: int = 10
    alpha: float = 0.1
    huber: float = 1.0
    prewhiten: str = "none"
    subsample: int | None = None
    min_size: int = 5
    boot: int = 999
    seed: int = 20261201
    null_window: int = 15

    def __post_init__(self) -> None:
        if self.cutoff < 2:
            raise InputError(f"--cutoff needs to be >= 2, got: {self.cutoff}.")
        if not 0 < self.alpha < 1:
            raise InputError(f"--alpha needs to be in (0, 1), got: {self.alpha}.")
        if self.huber <= 0:
            raise InputError(f"--huber needs to be > 0, got: {self.huber}.")
        if self.prewhiten not in ("none", "ip4", "mpk"):
            raise InputError(f"--prewhiten needs to be none, ip4 or mpk, got: "
                             f"{self.prewhiten!r}.")
        if self.min_size < 2:
            raise InputError(f"--min-size needs to be >= 2, got: {self.min_size}.")
        if self.null_window < 5:
            raise InputError(f"--null-window needs to be >= 5, got: {self.null_window}.")
        if self.boot < 0:
            raise InputError(f"--boot needs to be >= 0, got: {self.boot}.")


def _huber_mean(x: FloatArray, sigma: float, huber: float) -> float:
    m = float(np.mean(x))
    dev = np.abs(x - m)
    lim = huber * sigma
    if lim <= 0 or not np.any(dev > lim):
        return m
    w = np.where(dev > lim, lim / np.maximum(dev, 1e-300), 1.0)
    return float(np.dot(w, x) / w.sum())


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
        raise InputError(f"STARS needs a series at least twice the cut-off length ({2 * ell} "
                         f"values), got {n}; lower --cutoff.")
    sigma2 = float(sliding_window_view(v, ell).var(axis=1, ddof=1).mean())
    sigma = np.sqrt(sigma2)
    if sigma == 0:
        return [], []
    diff = float(sps.t.ppf(1 - alpha / 2, 2 * ell - 2)) * np.sqrt(2 * sigma2 / ell)
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
    """Penalised least-squares change points with ruptures' PELT (``jump=1``).

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
    """
    import ruptures as rpt

    v = np.asarray(x, float)
    pen = pelt_penalty(v) if penalty is None else penalty
    ends = rpt.Pelt(model="l2", min_size=min_size, jump=1).fit(v).predict(pen=pen)
    return [int(e) for e in ends[:-1]]


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


def largest_standardized_shift(v: FloatArray, starts: list[int]) -> float:
    """Largest |mean after - mean before| over the shifts, divided by :func:`robust_sd`."""
    if not starts:
        return 0.0
    means = _segment_means(v, starts)
    sd = robust_sd(v)
    return float(np.max(np.abs(np.diff(means)))) / sd if sd > 0 else 0.0


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


def _detect(v: FloatArray, method: str, opts: ShiftOptions) -> tuple[list[int], list[float]]:
    if method == "stars":
        return stars(v, opts.cutoff, opts.alpha, opts.huber)
    return pelt(v, opts.min_size), []


def _null_stats(method: str, n: int, phi: float, opts: ShiftOptions,
                rng: np.random.Generator) -> FloatArray:
    null = simulate_ar1(phi, n, opts.boot, rng)
    if opts.prewhiten != "none":
        sub = opts.subsample or max(5, (opts.cutoff + 1) // 3)
        null = np.array([prewhiten(s, opts.prewhiten, sub)[0] for s in null])
    if method == "pelt":
        pens = [pelt_penalty(s) for s in null]
        starts = optimal_partition_batch(null, pens, opts.min_size)
        return np.array([largest_standardized_shift(s, st) for s, st in zip(null, starts,
                                                                             strict=True)])
    return np.array([largest_standardized_shift(s, stars(s, opts.cutoff, opts.alpha,
                                                         opts.huber)[0]) for s in null])


@dataclass
class ShiftResult:
    """Shifts and regimes found by the detectors.

    Attributes
    ----------
    shifts
        One row a shift: ``method``, ``year`` (first year of the new regime),
        ``mean_before``, ``mean_after``, ``p_value``, ``rsi`` (STARS only).
    regimes
        One row a regime: ``method``, ``start``, ``end``, ``mean``, ``n``.
    phi
        Lag-1 autocorrelation of the bootstrap null (:func:`lag1_subsample_median`).
    prewhiten_rho
        Red-noise coefficient removed by prewhitening (None without).
    skipped_years
        Years without a value inside the series, closed up before detection.
    """

    shifts: pd.DataFrame
    regimes: pd.DataFrame
    phi: float
    prewhiten_rho: float | None = None
    skipped_years: list[int] = field(default_factory=list)


def detect_shifts(years: ArrayLike, values: ArrayLike, methods: tuple[str, ...] = METHODS,
                  opts: ShiftOptions | None = None) -> ShiftResult:
    """Detect regime shifts with each method and give each its bootstrap p-value.

    Parameters
    ----------
    years, values
        The yearly series. Years must be unique; missing values (NaN) and gap
        years inside the series are closed up and listed in ``skipped_years``.
    methods
        ``stars`` and/or ``pelt``.
    opts
        Detector and bootstrap settings.

    Returns
    -------
    ShiftResult
        Shifts, regimes and the fitted null.
    """
    opts = opts or ShiftOptions()
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
    phi = lag1_subsample_median(v, opts.null_window)
    rho = None
    work = v
    work_years = y
    if opts.prewhiten != "none":
        sub = opts.subsample or max(5, (opts.cutoff + 1) // 3)
        work, rho = prewhiten(v, opts.prewhiten, sub)
        work_years = y[1:]
    shift_rows, regime_rows = [], []
    for k, method in enumerate(methods):
        if method not in METHODS:
            raise InputError(f"--method needs to be stars, pelt or both, got: {method!r}.")
        starts, rsis = _detect(work, method, opts)
        # Report means and sizes on the original series, at the detected years.
        starts_v = [int(np.searchsorted(y, work_years[s])) for s in starts]
        means = _segment_means(v, starts_v)
        pvals = [float("nan")] * len(starts_v)
        if starts_v and opts.boot > 0:
            rng = np.random.default_rng(np.random.SeedSequence([opts.seed, k]))
            null = _null_stats(method, len(work), phi, opts, rng)
            seg = _segment_means(work, starts)  # sizes on the series the detector saw
            scale = robust_sd(work)
            for j in range(len(starts_v)):
                size = abs(seg[j + 1] - seg[j]) / scale if scale > 0 else 0.0
                pvals[j] = (1 + int(np.sum(null >= size - 1e-12))) / (opts.boot + 1)
        for j, s in enumerate(starts_v):
            shift_rows.append({"method": method, "year": int(y[s]), "mean_before": means[j],
                               "mean_after": means[j + 1], "p_value": pvals[j],
                               "rsi": rsis[j] if rsis else float("nan")})
        edges = [0, *starts_v, len(v)]
        for a, b, mu in zip(edges[:-1], edges[1:], means, strict=True):
            regime_rows.append({"method": method, "start": int(y[a]), "end": int(y[b - 1]),
                                "mean": mu, "n": b - a})
    shifts = pd.DataFrame(shift_rows, columns=["method", "year", "mean_before", "mean_after",
                                               "p_value", "rsi"])
    regimes = pd.DataFrame(regime_rows, columns=["method", "start", "end", "mean", "n"])
    return ShiftResult(shifts=shifts, regimes=regimes, phi=phi, prewhiten_rho=rho,
                       skipped_years=skipped)
