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
2. **Expected value and spread**, per model x scenario (members pooled): a
   local-linear regression with tricube weights over a 30-year span; near 2100
   the window is one-sided and the local line continues the last decades'
   trend (no flattening assumed). The spread is the SD of the residuals (ddof 2).
3. **Cold-year probability** for every year under the fixed cut values:
   ``P(cold) = Phi((low - m) / s)`` for temperatures (``Phi((m - high) / s)`` for
   areas, larger is colder); 0 or 1 when the spread is zero. The counted share
   of cold years in the window of ``w`` years starting at each year is also
   given.
4. **The year cold years stop**: the first year Y <= END - w + 1 such that for Y
   and every later window start, the probability of at least one cold year in
   the w-year window, ``1 - prod(1 - P(cold))`` (years independent given the
   expected value), is below ``p``. None: ``stopped`` is false ("not by END").

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
from scipy.special import expit, logit, ndtr

from coldindex.classify import Cuts
from coldindex.errors import InputError
from coldindex.schema import numeric_column

FloatArray = NDArray[np.float64]
ADJUSTMENTS = ("none", "delta", "qmap", "qdm")
FRACTION_CLIP = 1e-3


@dataclass(frozen=True)
class ProjectOptions:
    """Settings of the projection (``coldindex project``)."""

    adjust: str = "qdm"
    calibration: tuple[int, int] | None = None
    window: int = 10
    p_stop: float = 0.1
    span: int = 30
    qdm_window: int = 30

    def __post_init__(self) -> None:
        if self.adjust not in ADJUSTMENTS:
            raise InputError(f"--adjust needs to be one of {', '.join(ADJUSTMENTS)}, got: "
                             f"{self.adjust!r}.")
        if self.window < 1:
            raise InputError(f"--window needs to be >= 1, got: {self.window}.")
        if not 0 < self.p_stop < 1:
            raise InputError(f"--p-stop needs to be in (0, 1), got: {self.p_stop}.")


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
        raise InputError(f"--units {units!r} differ from the unit of {column!r} ({expected}); "
                         "convert the trajectories first (kelvin: subtract 273.15).")


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


def quantile_map(x: ArrayLike, model_cal: ArrayLike, obs_cal: ArrayLike) -> FloatArray:
    """Empirical quantile mapping with constant extrapolation of the correction.

    Each value's non-exceedance probability in the model's calibration sample
    (linear interpolation between order statistics, plotting positions
    ``(i - 0.5) / n``) is mapped to the same quantile of the observed
    calibration sample (numpy's linear quantiles). Beyond the model's
    calibration range the correction at the nearest end is added.

    References
    ----------
    Panofsky, H. A. & Brier, G. W. (1968). Some Applications of Statistics to
    Meteorology. Pennsylvania State University, 40-45.
    """
    x = np.asarray(x, float)
    m = np.sort(np.asarray(model_cal, float))
    o = np.asarray(obs_cal, float)
    pp = (np.arange(1, len(m) + 1) - 0.5) / len(m)
    tau = np.interp(x, m, pp)
    out = np.quantile(o, tau)
    lo_corr = np.quantile(o, pp[0]) - m[0]
    hi_corr = np.quantile(o, pp[-1]) - m[-1]
    out = np.where(x < m[0], x + lo_corr, out)
    return np.asarray(np.where(x > m[-1], x + hi_corr, out), dtype=np.float64)


def quantile_delta_map(years: ArrayLike, x: ArrayLike, model_cal: ArrayLike,
                       obs_cal: ArrayLike, window: int = 30) -> FloatArray:
    """Quantile delta mapping (additive), Cannon et al. (2015).

    For each year t: tau = the value's non-exceedance probability among the
    model's values in the ``window`` years centred on t (shifted inward at the
    ends); the model's change at that quantile, ``x - Fmod_cal^-1(tau)``, is added
    to the observed calibration quantile ``Fobs_cal^-1(tau)``.

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
    order = np.argsort(y)
    for k, i in enumerate(order):
        start = int(np.clip(k - w // 2, 0, n - w))
        idx = order[start:start + w]
        sample = x[idx]
        rank = np.sum(sample < x[i]) + 0.5 * (np.sum(sample == x[i]) + 1) - 0.5
        tau = float(np.clip(rank / len(sample), 0.5 / len(sample), 1 - 0.5 / len(sample)))
        out[i] = np.quantile(oc, tau) + (x[i] - np.quantile(mc, tau))
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
                         "it needs at least 5 of each (adjust --calibration).")
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


def local_linear(years: ArrayLike, values: ArrayLike, at: ArrayLike, span: int = 30
                 ) -> FloatArray:
    """Local-linear regression with tricube weights over ``span`` years.

    References
    ----------
    Cleveland, W. S. (1979). Robust locally weighted regression and smoothing
    scatterplots. JASA 74, 829-836 (here without robustness iterations).
    """
    t = np.asarray(years, float)
    v = np.asarray(values, float)
    out = np.empty(len(np.asarray(at)))
    h = span / 2.0 + 0.5
    for k, t0 in enumerate(np.asarray(at, float)):
        d = np.abs(t - t0) / h
        w = np.where(d < 1, (1 - d**3) ** 3, 0.0)
        sw = w.sum()
        tm = (w * t).sum() / sw
        vm = (w * v).sum() / sw
        var = (w * (t - tm) ** 2).sum()
        slope = (w * (t - tm) * (v - vm)).sum() / var if var > 0 else 0.0
        out[k] = vm + slope * (t0 - tm)
    return out


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


def stop_year(years: ArrayLike, p_cold: ArrayLike, window: int = 10, p: float = 0.1
              ) -> int | None:
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

    Returns
    -------
    int or None
        The stop year, or None when there is none by the end.
    """
    y = np.asarray(years, int)
    pc = np.clip(np.asarray(p_cold, float), 0.0, 1.0)
    n = len(y)
    if n < window:
        return None
    log_none = np.log1p(-np.minimum(pc, 1 - 1e-16))
    csum = np.concatenate([[0.0], np.cumsum(log_none)])
    p_any = 1.0 - np.exp(csum[window:] - csum[:-window])  # window starting at y[k]
    below = p_any < p
    ok_from = np.flatnonzero(~below)
    start = 0 if len(ok_from) == 0 else int(ok_from[-1]) + 1
    return int(y[start]) if start < len(below) else None


@dataclass
class ProjectionResult:
    """Outputs of :func:`project`."""

    projection: pd.DataFrame
    emergence: pd.DataFrame
    summaries: list[str]
    calibration: tuple[int, int]


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
                         "--calibration within both records.")
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
        years = np.arange(int(gg["year"].min()), int(gg["year"].max()) + 1)
        expected = local_linear(gg["year"], gg["value_adjusted"], years, options.span)
        fitted = pd.Series(expected, index=years)
        resid = gg["value_adjusted"].to_numpy() - fitted.loc[gg["year"]].to_numpy()
        dof = max(len(resid) - 2, 1)
        spread = float(np.sqrt(np.sum(resid**2) / dof))
        if spread < 1e-9 * max(1.0, float(np.abs(expected).max())):
            spread = 0.0
        p_cold, p_warm = cold_probability(expected, spread, cuts)
        pc = pd.Series(p_cold, index=years)
        pw = pd.Series(p_warm, index=years)
        gg = gg.assign(cls=classify_values(gg["value_adjusted"], cuts))
        is_cold = (gg["cls"] == "cold").groupby(gg["year"]).mean().reindex(years)
        freq = is_cold.rolling(options.window).mean().shift(-(options.window - 1))
        gg = gg.assign(p_cold=pc.loc[gg["year"]].to_numpy(), p_warm=pw.loc[gg["year"]].to_numpy(),
                       cold_freq_window=freq.loc[gg["year"]].to_numpy())
        rows.append(gg)
        sy = stop_year(years, p_cold, options.window, options.p_stop)
        cold_years = gg.loc[gg["cls"] == "cold", "year"]
        emergence.append({"model": model, "scenario": scenario,
                          "last_cold_year": int(cold_years.max()) if len(cold_years) else None,
                          "stop_year": sy, "stopped": sy is not None, "spread": spread})
    proj = pd.concat(rows).rename(columns={"cls": "class"})
    proj = proj[["model", "scenario", "member", "year", "value", "value_adjusted", "class",
                 "p_cold", "p_warm", "cold_freq_window"]].reset_index(drop=True)
    em = pd.DataFrame(emergence)
    summaries = []
    ens_rows = []
    marks = tuple(sorted({*milestones, end}))
    for scenario, g in em.groupby("scenario", sort=True):
        stops = np.array([s if s is not None and s == s else np.inf for s in g["stop_year"]],
                         dtype=float)
        med = float(np.median(stops))
        n = len(stops)
        by = {m: int(np.sum(stops <= m)) for m in marks}
        finite_stops = stops[np.isfinite(stops)]
        lo = int(finite_stops.min()) if len(finite_stops) else None
        hi = int(stops.max()) if np.all(np.isfinite(stops)) else None
        ens_rows.append({"model": "ensemble median", "scenario": scenario,
                         "last_cold_year": None,
                         "stop_year": int(round(med)) if np.isfinite(med) else None,
                         "stopped": bool(np.isfinite(med)), "spread": None,
                         "models": n, "models_stopped": int(np.sum(np.isfinite(stops))),
                         "stop_year_min": lo, "stop_year_max": hi})
        when = (f"around {int(round(med))}" if np.isfinite(med)
                else f"not by {end} in most models")
        rng_text = (f"models range {lo if lo is not None else 'none'}–"
                    f"{hi if hi is not None else f'not by {end}'}")
        counts = "; ".join(f"{by[m]} of {n} models by {m}" for m in marks)
        summaries.append(f"Under scenario {scenario}, cold years stop being expected {when} "
                         f"({rng_text}; {counts}).")
    em_out = pd.concat([em, pd.DataFrame(ens_rows)], ignore_index=True)
    cols = ["model", "scenario", "last_cold_year", "stop_year", "stopped", "spread", "models",
            "models_stopped", "stop_year_min", "stop_year_max"]
    em_out = em_out.reindex(columns=cols)
    for c in ("last_cold_year", "stop_year", "models", "models_stopped", "stop_year_min",
              "stop_year_max"):
        em_out[c] = em_out[c].astype("Int64")
    return ProjectionResult(projection=proj, emergence=em_out, summaries=summaries,
                            calibration=cal)
