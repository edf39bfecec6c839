"""Ice-to-bottom-temperature predictability: lagged skill, persistence, hindcast, outlook.

Predictors are winter-month ice values and a winter aggregate. **Winter
labelling:** a winter is labelled with the year of the first survey that starts
after the winter's last month, and ``lag`` L pairs winter W with the target of
year W + L, so lag 0 pairs a winter with the first survey after it. The ice file
keeps calendar year and month. With a July survey and winter months 11-4,
November and December of year Y belong to winter Y+1; with a January survey and
winter months 5-10, May to October of year Y belong to winter Y+1 (the survey of
January Y+1). The survey month is given, or read from the target's median survey
day (:func:`survey_month`).

Significance accounts for the autocorrelation of both series through
Bretherton et al.'s (1999, eq. 31) effective sample size, with lag-1
autocorrelations estimated with the Marriott-Pope-Kendall bias correction,
and for the many month x lag combinations through Benjamini-Hochberg q-values.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray
from scipy.special import ndtr, ndtri

from coldindex.classify import Cuts
from coldindex.errors import InputError, TooFewDataError
from coldindex.schema import numeric_column
from coldindex.stats import (
    benjamini_hochberg,
    effective_sample_size_pair,
    fisher_z_test,
    lag1_bias_corrected,
    williams_t,
)

FloatArray = NDArray[np.float64]
MONTH_NAMES = ("jan", "feb", "mar", "apr", "may", "jun", "jul", "aug", "sep", "oct", "nov",
               "dec")
MIN_YEARS = 10


def parse_months(text: str) -> list[int]:
    """Parse a month span ``A-B`` (wrapping over the new year, e.g. ``11-4``) or a list."""
    try:
        if "-" in text:
            a, b = (int(v) for v in text.split("-"))
            months = list(range(a, b + 1)) if a <= b else [*range(a, 13), *range(1, b + 1)]
        else:
            months = [int(v) for v in text.split(",")]
    except ValueError:
        raise InputError(f"--months needs a span like 11-4 or a list like 1,2,3, got: "
                         f"{text!r}.") from None
    if not months or any(m < 1 or m > 12 for m in months):
        raise InputError(f"--months needs months in 1..12, got: {text!r}.")
    return months


def parse_lags(text: str) -> list[int]:
    """Parse lags ``A-B`` (inclusive) or a list ``0,1,3`` into sorted whole years >= 0."""
    try:
        if "-" in text:
            a, b = (int(v) for v in text.split("-"))
            lags = list(range(a, b + 1))
        else:
            lags = sorted({int(v) for v in text.split(",")})
    except ValueError:
        raise InputError(f"--lags needs a span like 0-2 or a list like 0,1, got: "
                         f"{text!r}.") from None
    if not lags or lags[0] < 0:
        raise InputError(f"--lags needs whole years >= 0, got: {text!r}.")
    return lags


def ice_frame(raw: pd.DataFrame, source: str = "ice file") -> pd.DataFrame:
    """Validate an ice table read as strings (``row``, ``year``, ``month``, ``ice``).

    Returns
    -------
    pandas.DataFrame
        ``year``, ``month`` (int) and ``ice`` (float, NaN for blanks).
    """
    out = pd.DataFrame({"row": raw["row"]})
    for col in ("year", "month", "ice"):
        out[col] = numeric_column(raw, col, source, whole=col != "ice",
                                  allow_blank=col == "ice")
    out["year"] = out["year"].astype(int)
    out["month"] = out["month"].astype(int)
    bad = (out["month"] < 1) | (out["month"] > 12)
    if bad.any():
        r = out.loc[bad, "row"].iloc[0]
        raise InputError(f"{source}, row {r}: month {out.loc[bad, 'month'].iloc[0]} is outside "
                         "1..12.")
    neg = out["ice"] < 0
    if neg.any():
        r, v = out.loc[neg, "row"].iloc[0], out.loc[neg, "ice"].iloc[0]
        raise InputError(f"{source}, row {r}: negative ice ({v}); ice mass cannot be negative.")
    dup = out.duplicated(["year", "month"], keep=False)
    if dup.any():
        rows = ", ".join(str(r) for r in out.loc[dup, "row"].head(4))
        raise InputError(f"{source}, rows {rows}: the same year and month appear more than "
                         "once; keep one value a month.")
    return out.drop(columns="row")


def survey_month(given: int | None = None, median_doy: ArrayLike | None = None) -> int:
    """The survey's month, given or from the target's median survey day. [1..12]

    Parameters
    ----------
    given
        The month (1..12) from ``--survey-month`` or ``skill.survey_month``; None
        (or 0 from the config) to derive it.
    median_doy
        Each year's median day of year of the casts (``median_doy`` of
        ``indices.csv``); the month of their median (a non-leap calendar) is used.

    Returns
    -------
    int
        The survey month.
    """
    if given:
        if not 1 <= int(given) <= 12:
            raise InputError(f"--survey-month (skill.survey_month) needs a month in 1..12, "
                             f"got: {given}.")
        return int(given)
    doy = np.asarray(median_doy if median_doy is not None else [], float)
    doy = doy[np.isfinite(doy)]
    if len(doy) == 0:
        raise InputError("The target has no median_doy column to tell the survey month; give "
                         "it with --survey-month M (1..12) or skill.survey_month.")
    day = int(np.clip(np.round(np.median(doy)), 1, 365))
    return int((pd.Timestamp(2001, 1, 1) + pd.Timedelta(days=day - 1)).month)


def winter_labels(year: ArrayLike, month: ArrayLike, months: list[int], survey: int
                  ) -> NDArray[np.int64]:
    """Winter label of each (calendar year, month) of the ice file. [year]

    A winter is labelled with the year of the first survey that starts after the
    winter's last month; lag 0 pairs that winter with that survey.

    Parameters
    ----------
    year, month
        Calendar year and month of each ice value (months inside ``months``).
    months
        Winter months in order (e.g. 11, 12, 1, ..., 4, or 5, ..., 10); when the
        span wraps over the new year, months at or after the first belong to the
        winter that ends in the next calendar year.
    survey
        Month the survey starts (1..12); it must not fall inside the winter.

    Returns
    -------
    numpy.ndarray
        The winter label of each value.

    Examples
    --------
    >>> winter_labels([2000, 2001], [11, 4], [11, 12, 1, 2, 3, 4], survey=7).tolist()
    [2001, 2001]
    >>> winter_labels([2000, 2000], [5, 10], [5, 6, 7, 8, 9, 10], survey=1).tolist()
    [2001, 2001]
    """
    if survey in months:
        raise InputError(f"The survey month {survey} falls inside the winter months "
                         f"{','.join(map(str, months))}; choose --months (skill.months) that "
                         "end before the survey starts, or set --survey-month "
                         "(skill.survey_month).")
    y = np.asarray(year, dtype=np.int64)
    m = np.asarray(month, dtype=np.int64)
    wraps = months[0] > months[-1]
    end_year = y + ((m >= months[0]) & wraps).astype(np.int64)  # calendar year of the last month
    return end_year + int(survey <= months[-1])


def winter_predictors(ice: pd.DataFrame, months: list[int], aggregate: str = "mean", *,
                      survey: int) -> pd.DataFrame:
    """One row a winter (labelled by the first survey after it), one column a predictor.

    Parameters
    ----------
    ice
        ``year``, ``month``, ``ice`` (see :func:`ice_frame`).
    months
        Winter months in order (e.g. 11, 12, 1, ..., 4, or 5, ..., 10).
    aggregate
        ``mean`` or ``max`` over the months: the ``ice_winter_<aggregate>``
        predictor, NaN for a winter missing any of them.
    survey
        Month the survey starts (1..12), see :func:`survey_month`; winters are
        labelled by :func:`winter_labels`.

    Returns
    -------
    pandas.DataFrame
        Indexed by winter label; columns ``ice_<mon>`` and the aggregate.
    """
    if aggregate not in ("mean", "max"):
        raise InputError(f"--winter needs to be mean or max, got: {aggregate!r}.")
    sub = ice[ice["month"].isin(months)].copy()
    sub["winter"] = winter_labels(sub["year"], sub["month"], months, survey)
    wide = sub.pivot(index="winter", columns="month", values="ice").reindex(columns=months)
    wide.columns = [f"ice_{MONTH_NAMES[m - 1]}" for m in months]
    agg = wide.mean(axis=1, skipna=False) if aggregate == "mean" else wide.max(axis=1,
                                                                              skipna=False)
    wide[f"ice_winter_{aggregate}"] = agg
    return wide.sort_index()


def _anomaly(values: pd.Series | FloatArray, years: ArrayLike,
             reference: tuple[int, int] | None) -> FloatArray:
    v = np.asarray(values, float)
    y = np.asarray(years)
    keep = np.isfinite(v)
    if reference is not None:
        keep &= (y >= reference[0]) & (y <= reference[1])
    if keep.sum() < 2:
        raise TooFewDataError("The reference period holds fewer than 2 values; widen "
                              "--reference.")
    return v - float(np.mean(v[keep]))


def _pairs(pred: pd.Series, target: pd.Series, lag: int) -> pd.DataFrame:
    """Align winter W's predictor with target year W + lag."""
    p = pred.copy()
    p.index = p.index + lag
    df = pd.DataFrame({"x": p, "y": target}).dropna()
    df.index.name = "year"
    return df


def _corr(a: FloatArray, b: FloatArray) -> float:
    if len(a) < 3 or np.std(a) == 0 or np.std(b) == 0:
        return float("nan")
    return float(np.corrcoef(a, b)[0, 1])


def skill_table(predictors: pd.DataFrame, target: pd.Series, lags: list[int],
                confidence: float = 0.9, reference: tuple[int, int] | None = None
                ) -> pd.DataFrame:
    """Lagged correlation of every predictor with the target, with honest significance.

    Parameters
    ----------
    predictors
        From :func:`winter_predictors` (index: winter label).
    target
        Target values indexed by year.
    lags
        Lags in years (0 = the summer after the winter).
    confidence
        Confidence of the interval (default 0.9).
    reference
        Reference period of the anomalies.

    Returns
    -------
    pandas.DataFrame
        One row per predictor x lag: ``predictor``, ``lag``, ``n``, ``n_eff``, ``r``,
        ``r_lo``, ``r_hi``, ``confidence``, ``p_value``, ``q_value``,
        ``r_persistence``, ``p_beats_persistence``.
    """
    t_anom = pd.Series(_anomaly(target.to_numpy(), target.index, reference), index=target.index)
    prev = pd.Series(t_anom.to_numpy(), index=t_anom.index + 1)
    rows = []
    for name in predictors.columns:
        col = predictors[name].dropna()
        if len(col) < 3:
            continue
        p_anom = pd.Series(_anomaly(col.to_numpy(), col.index, reference), index=col.index)
        r1x = lag1_bias_corrected(p_anom.to_numpy())
        for lag in lags:
            pr = _pairs(p_anom, t_anom, lag)
            n = len(pr)
            r = _corr(pr["x"].to_numpy(), pr["y"].to_numpy())
            r1y = lag1_bias_corrected(pr["y"].to_numpy()) if n > 4 else float("nan")
            n_eff = effective_sample_size_pair(n, r1x, r1y) if n > 4 else float("nan")
            lo, hi, p = fisher_z_test(r, n_eff, confidence)
            # Persistence: last year's target anomaly, on the years both forecasts share.
            both = pr.join(prev.rename("prev"), how="inner").dropna()
            r_pers = p_beats = float("nan")
            if len(both) >= 5 and np.isfinite(r):
                sign = 1.0 if r >= 0 else -1.0
                x = sign * both["x"].to_numpy()
                y, z = both["y"].to_numpy(), both["prev"].to_numpy()
                r12, r13, r23 = _corr(y, x), _corr(y, z), _corr(x, z)
                r_pers = r13
                ne = effective_sample_size_pair(len(both), r1x, lag1_bias_corrected(y))
                _, p_beats = williams_t(r12, r13, r23, ne)
            rows.append({"predictor": name, "lag": lag, "n": n, "n_eff": n_eff, "r": r,
                         "r_lo": lo, "r_hi": hi, "confidence": confidence, "p_value": p,
                         "r_persistence": r_pers, "p_beats_persistence": p_beats})
    table = pd.DataFrame(rows)
    if table.empty:
        raise TooFewDataError("The ice and target series share too few years to compute any "
                              f"correlation; they need at least {MIN_YEARS} common years.")
    table["q_value"] = benjamini_hochberg(table["p_value"].to_numpy())
    cols = ["predictor", "lag", "n", "n_eff", "r", "r_lo", "r_hi", "confidence", "p_value",
            "q_value", "r_persistence", "p_beats_persistence"]
    return table[cols]


@dataclass
class Hindcast:
    """Cross-validated hindcast of the target from the best ice predictor.

    Attributes
    ----------
    table
        ``year``, ``observed``, ``predicted``, ``persistence``, ``predictor``.
    anomaly_correlation, rmse
        Skill of the hindcast (rmse in the target's unit).
    msss_climatology, msss_persistence
        Mean-square skill scores against climatology and persistence.
    leave_out
        Years left out around each forecast year (1 = leave-one-out).
    lag
        Lag of the hindcast.
    """

    table: pd.DataFrame
    anomaly_correlation: float
    rmse: float
    msss_climatology: float
    msss_persistence: float
    leave_out: int
    lag: int


def _choose_and_fit(X: pd.DataFrame, y: pd.Series) -> tuple[str, float, float, float, float]:
    """Pick the predictor with the largest |r| on these years; fit y ~ x by OLS.

    Returns the predictor, slope, intercept, and the means of x and y used.
    """
    best, best_r = None, -1.0
    for name in X.columns:
        ok = X[name].notna() & y.notna()
        if ok.sum() < 5:
            continue
        r = abs(_corr(X.loc[ok, name].to_numpy(), y[ok].to_numpy()))
        if np.isfinite(r) and r > best_r:
            best, best_r = name, r
    if best is None:
        raise TooFewDataError("too few years to choose a predictor")
    ok = X[best].notna() & y.notna()
    x, yy = X.loc[ok, best].to_numpy(), y[ok].to_numpy()
    slope, intercept = np.polyfit(x, yy, 1)
    return best, float(slope), float(intercept), float(x.mean()), float(yy.mean())


def hindcast(predictors: pd.DataFrame, target: pd.Series, lag: int = 0, leave_out: int = 1
             ) -> Hindcast:
    """Leave-k-out cross-validated regression hindcast, predictor chosen inside each fold.

    For each year Y with a predictor value, the years within ``leave_out // 2`` of
    Y are removed; on the rest the climatology, the predictor with the largest
    |r| and the regression are fitted, then Y is forecast. No information from
    Y (or its neighbours) reaches its forecast. Persistence forecasts Y by the
    observed Y - 1, climatology by the training mean.

    Parameters
    ----------
    predictors
        Winter predictors indexed by winter label.
    target
        Target values indexed by year.
    lag
        Target year = winter label + lag.
    leave_out
        Odd number of years left out around each forecast year (1 = leave-one-out;
        3 or more for autocorrelated series).

    Returns
    -------
    Hindcast
        The forecasts and their skill.
    """
    if leave_out < 1 or leave_out % 2 == 0:
        raise InputError(f"--leave-out needs an odd number >= 1, got: {leave_out}.")
    X = predictors.copy()
    X.index = X.index + lag
    years = sorted(set(X.index[X.notna().any(axis=1)]) & set(target.dropna().index))
    if len(years) < MIN_YEARS:
        raise TooFewDataError(f"The ice and target series share {len(years)} years; the "
                              f"hindcast needs at least {MIN_YEARS}.")
    half = leave_out // 2
    rows = []
    for yr in years:
        train = [t for t in years if abs(t - yr) > half]
        best, slope, intercept, _, ymean = _choose_and_fit(X.loc[train], target[train])
        xv = X.loc[yr, best]
        pred = intercept + slope * xv if np.isfinite(xv) else np.nan
        prev = target.get(yr - 1, np.nan)
        rows.append({"year": yr, "observed": float(target[yr]), "predicted": float(pred),
                     "persistence": float(prev), "climatology": ymean, "predictor": best})
    tab = pd.DataFrame(rows)
    ok = tab["predicted"].notna()
    obs, pred, clim = (tab.loc[ok, c].to_numpy() for c in ("observed", "predicted",
                                                           "climatology"))
    mse = float(np.mean((obs - pred) ** 2))
    mse_clim = float(np.mean((obs - clim) ** 2))
    pers_ok = ok & tab["persistence"].notna()
    mse_p = float(np.mean((tab.loc[pers_ok, "observed"] - tab.loc[pers_ok, "persistence"]) ** 2))
    mse_fp = float(np.mean((tab.loc[pers_ok, "observed"] - tab.loc[pers_ok, "predicted"]) ** 2))
    return Hindcast(table=tab, anomaly_correlation=_corr(obs - clim, pred - clim),
                    rmse=float(np.sqrt(mse)), msss_climatology=1.0 - mse / mse_clim,
                    msss_persistence=1.0 - mse_fp / mse_p, leave_out=leave_out, lag=lag)


def outlook(predictors: pd.DataFrame, target: pd.Series, hc: Hindcast, cuts: Cuts,
            confidence: float = 0.9) -> dict:
    """Forecast for the latest winter's target year, with interval and class probabilities.

    The regression and the predictor are fitted on all shared years; the
    interval and the probabilities assume a Gaussian error with the
    cross-validated hindcast RMSE (climatology computed inside each fold).

    Returns
    -------
    dict
        ``year``, ``predictor``, ``winter``, ``predicted``, ``lo``, ``hi``,
        ``confidence``, ``p_cold``, ``p_average``, ``p_warm``, ``cuts``, and
        ``observed`` and ``observed_class`` when that summer is already observed.
    """
    X = predictors.copy()
    X.index = X.index + hc.lag
    years = sorted(set(X.index[X.notna().any(axis=1)]) & set(target.dropna().index))
    best, slope, intercept, _, _ = _choose_and_fit(X.loc[years], target[years])
    avail = predictors[best].dropna()
    winter = int(avail.index.max())
    year = winter + hc.lag
    pred = intercept + slope * float(avail[winter])
    s = hc.rmse
    zc = float(ndtri(0.5 + confidence / 2.0))
    p_low = float(ndtr((cuts.low - pred) / s))
    p_high = float(ndtr((pred - cuts.high) / s))
    colder_low = cuts.direction == "lower"
    out = {"year": year, "winter": winter, "lag": hc.lag, "predictor": best,
           "predicted": pred, "lo": pred - zc * s, "hi": pred + zc * s,
           "confidence": confidence, "p_cold": p_low if colder_low else p_high,
           "p_average": 1.0 - p_low - p_high, "p_warm": p_high if colder_low else p_low,
           "cuts": cuts.to_dict(), "hindcast_rmse": s}
    if year in target.index and np.isfinite(target[year]):
        v = float(target[year])
        cls = "average"
        if v < cuts.low:
            cls = "cold" if colder_low else "warm"
        elif v > cuts.high:
            cls = "warm" if colder_low else "cold"
        out["observed"] = v
        out["observed_class"] = cls
    return out


def outlook_sentence(o: dict, column: str) -> str:
    """One sentence for the terminal and the report."""
    probs = max(("cold", o["p_cold"]), ("average", o["p_average"]), ("warm", o["p_warm"]),
                key=lambda t: t[1])
    text = (f"From the {o['predictor'].replace('ice_', '').replace('_', ' ')} ice of winter "
            f"{o['winter']}, {column} in {o['year']} is forecast at {o['predicted']:.3g} "
            f"({o['confidence']:.0%} interval {o['lo']:.3g} to {o['hi']:.3g}); "
            f"P(cold) = {o['p_cold']:.2f}, P(average) = {o['p_average']:.2f}, "
            f"P(warm) = {o['p_warm']:.2f}, most likely {probs[0]}.")
    if "observed" in o:
        text += (f" That summer is already observed: {o['observed']:.3g} "
                 f"({o['observed_class']}); the true pre-survey outlook is a run in spring "
                 "with the new winter's ice.")
    return text
