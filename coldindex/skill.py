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

from collections.abc import Sequence
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
            raise InputError(f"{{option}} needs a month in 1..12, got: {given}.",
                             option=("skill", "survey_month"))
        return int(given)
    doy = np.asarray(median_doy if median_doy is not None else [], float)
    doy = doy[np.isfinite(doy)]
    if len(doy) == 0:
        raise InputError("The target has no median_doy column to tell the survey month; give "
                         "it with {option} (1..12).", option=("skill", "survey_month"))
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
                         f"{','.join(map(str, months))}; choose {{option}} that end before the "
                         "survey starts, or give the survey month.", option=("skill", "months"))
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
        raise InputError(f"{{option}} needs to be mean or max, got: {aggregate!r}.",
                         option=("skill", "winter"))
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
                              "{option}.", option=("skill", "reference"))
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
        Lags in years (0 = the first survey after the winter).
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
    """Cross-validated hindcast of the target from the best ice predictor and lag.

    Attributes
    ----------
    table
        ``year``, ``observed``, ``predicted``, ``persistence``, ``climatology``,
        ``predictor``, ``lag`` (the predictor and lag chosen in that year's fold).
    anomaly_correlation, rmse
        Skill of the hindcast (rmse in the target's unit).
    msss_climatology, msss_persistence
        Mean-square skill scores against climatology and persistence.
    leave_out
        Years left out around each forecast year (1 = leave-one-out).
    lag
        The lag chosen most often across the folds.
    lags
        The lags the choice was made from.
    """

    table: pd.DataFrame
    anomaly_correlation: float
    rmse: float
    msss_climatology: float
    msss_persistence: float
    leave_out: int
    lag: int
    lags: tuple[int, ...] = (0,)


def _lagged_candidates(predictors: pd.DataFrame, lags: Sequence[int]) -> pd.DataFrame:
    """Every predictor at every lag, indexed by target year (columns ``(predictor, lag)``)."""
    cols = {}
    for lag in lags:
        for name in predictors.columns:
            s = predictors[name].copy()
            s.index = s.index + lag
            cols[(name, lag)] = s
    return pd.DataFrame(cols)


def _choose_and_fit(X: pd.DataFrame, y: pd.Series
                    ) -> tuple[tuple[str, int], float, float, float]:
    """Pick the candidate with the largest |r| on these years; fit y ~ x by OLS.

    Returns the ``(predictor, lag)`` chosen, slope, intercept and the mean of y.
    """
    best, best_r = None, -1.0
    for key in X.columns:
        ok = X[key].notna() & y.notna()
        if ok.sum() < 5:
            continue
        r = abs(_corr(X.loc[ok, key].to_numpy(), y[ok].to_numpy()))
        if np.isfinite(r) and r > best_r:
            best, best_r = key, r
    if best is None:
        raise TooFewDataError("The ice and target series share fewer than 5 years at every "
                              "lag; a predictor cannot be chosen.")
    ok = X[best].notna() & y.notna()
    x, yy = X.loc[ok, best].to_numpy(), y[ok].to_numpy()
    slope, intercept = np.polyfit(x, yy, 1)
    return (str(best[0]), int(best[1])), float(slope), float(intercept), float(yy.mean())


def hindcast(predictors: pd.DataFrame, target: pd.Series, lags: int | Sequence[int] = 0,
             leave_out: int = 1) -> Hindcast:
    """Leave-k-out cross-validated regression hindcast; predictor and lag chosen in each fold.

    For each target year Y, the years within ``leave_out // 2`` of Y are
    removed; on the rest the climatology, the predictor *and lag* with the
    largest |r| (among those whose winter value for Y exists) and the
    regression are fitted, then Y is forecast. No information from Y (or its
    neighbours) reaches its forecast, the choice of lag included. Persistence
    forecasts Y by the observed Y - 1, climatology by the training mean.

    Parameters
    ----------
    predictors
        Winter predictors indexed by winter label.
    target
        Target values indexed by year.
    lags
        Lag or lags to choose from (target year = winter label + lag).
    leave_out
        Odd number of years left out around each forecast year (1 = leave-one-out;
        3 or more for autocorrelated series).

    Returns
    -------
    Hindcast
        The forecasts and their skill.
    """
    if leave_out < 1 or leave_out % 2 == 0:
        raise InputError(f"{{option}} needs an odd number >= 1, got: {leave_out}.",
                         option=("skill", "leave_out"))
    lag_list = sorted({int(lags)} if isinstance(lags, (int, np.integer)) else
                      {int(v) for v in lags})
    X = _lagged_candidates(predictors, lag_list)
    tgt = target.dropna()
    years = sorted(set(X.index[X.notna().any(axis=1)]) & set(tgt.index))
    if len(years) < MIN_YEARS:
        raise TooFewDataError(f"The ice and target series share {len(years)} years; the "
                              f"hindcast needs at least {MIN_YEARS}.")
    X = X.loc[years]
    y = tgt.loc[years]
    half = leave_out // 2
    rows = []
    for yr in years:
        train = [t for t in years if abs(t - yr) > half]
        usable = X.columns[X.loc[yr].notna().to_numpy()]
        (best, lag), slope, intercept, _ = _choose_and_fit(X.loc[train, usable], y[train])
        pred = intercept + slope * float(X.loc[yr, (best, lag)])
        prev = target.get(yr - 1, np.nan)
        rows.append({"year": yr, "observed": float(y[yr]), "predicted": float(pred),
                     "persistence": float(prev), "climatology": float(y[train].mean()),
                     "predictor": best, "lag": lag})
    tab = pd.DataFrame(rows)
    obs, pred, clim = (tab[c].to_numpy() for c in ("observed", "predicted", "climatology"))
    mse = float(np.mean((obs - pred) ** 2))
    mse_clim = float(np.mean((obs - clim) ** 2))
    pers_ok = tab["persistence"].notna()
    mse_p = float(np.mean((tab.loc[pers_ok, "observed"] - tab.loc[pers_ok, "persistence"]) ** 2))
    mse_fp = float(np.mean((tab.loc[pers_ok, "observed"] - tab.loc[pers_ok, "predicted"]) ** 2))
    modal = int(tab["lag"].value_counts().sort_index().idxmax())
    return Hindcast(table=tab, anomaly_correlation=_corr(obs - clim, pred - clim),
                    rmse=float(np.sqrt(mse)), msss_climatology=1.0 - mse / mse_clim,
                    msss_persistence=1.0 - mse_fp / mse_p, leave_out=leave_out, lag=modal,
                    lags=tuple(lag_list))


def _class_of(v: float, cuts: Cuts) -> str:
    colder_low = cuts.direction == "lower"
    if v < cuts.low:
        return "cold" if colder_low else "warm"
    if v > cuts.high:
        return "warm" if colder_low else "cold"
    return "average"


def outlook(predictors: pd.DataFrame, target: pd.Series, hc: Hindcast, cuts: Cuts,
            confidence: float = 0.9, table: pd.DataFrame | None = None, q_max: float = 0.1,
            reference: tuple[int, int] | None = None) -> dict:
    """Outlook for the next target year: from the ice when it has skill, else climatology.

    The target year is the latest winter label plus the smallest lag of the
    hindcast (the first survey the newest ice can speak for). The predictor and
    lag are chosen among ``hc.lags`` as in the hindcast (largest |r| on all
    shared years, among those whose winter value for that year exists) and the
    regression is fitted on all shared years; the interval and the class
    probabilities assume a Gaussian error with the cross-validated hindcast
    RMSE. When the hindcast's skill score against climatology is not positive,
    or the chosen predictor and lag's q-value in ``table`` is above ``q_max``,
    the outlook is climatological instead: the class frequencies of the target
    over the reference period, the reference mean, and its empirical interval.

    Parameters
    ----------
    predictors, target
        As for :func:`hindcast`.
    hc
        The hindcast (its lags and cross-validated skill).
    cuts
        Cut values of the target's classes.
    confidence
        Confidence of the interval.
    table
        The skill table (:func:`skill_table`) with the q-values and the test
        against persistence; without it only the skill score decides.
    q_max
        Largest q-value the chosen predictor may have for a regression outlook.
    reference
        Reference period of the climatological outlook (default: every year).

    Returns
    -------
    dict
        ``year``, ``winter``, ``lag``, ``predictor``, ``basis`` (``regression`` or
        ``climatology``), ``reason`` (why climatology; empty otherwise),
        ``predicted``, ``lo``, ``hi``, ``confidence``, ``p_cold``, ``p_average``,
        ``p_warm``, ``climatology`` (the reference class frequencies, cold,
        average, warm), ``cuts``, ``hindcast_rmse``, ``msss_climatology``,
        ``q_value``, ``q_max``, ``p_beats_persistence``, ``beats_persistence``,
        ``lags_considered``, and ``observed``/``observed_class`` when that year is
        already observed.
    """
    X = _lagged_candidates(predictors, hc.lags)
    tgt = target.dropna()
    winter = int(predictors.index[predictors.notna().any(axis=1)].max())
    year = winter + min(hc.lags)
    if year in X.index:
        usable = X.columns[X.loc[year].notna().to_numpy()]
    else:
        usable = X.columns[:0]
    if len(usable) == 0:
        raise TooFewDataError(f"No ice predictor has a value for the outlook year {year} at "
                              f"lags {', '.join(map(str, hc.lags))}; check the newest winter "
                              "of the ice file.")
    years = sorted(set(X.index[X.notna().any(axis=1)]) & set(tgt.index))
    (best, lag), slope, intercept, _ = _choose_and_fit(X.loc[years, usable], tgt[years])
    pred = intercept + slope * float(X.loc[year, (best, lag)])
    q = p_beats = float("nan")
    if table is not None:
        row = table[(table["predictor"] == best) & (table["lag"] == lag)]
        if len(row):
            q = float(row["q_value"].iloc[0])
            p_beats = float(row["p_beats_persistence"].iloc[0])
    ref = tgt if reference is None else tgt[(tgt.index >= reference[0])
                                             & (tgt.index <= reference[1])]
    classes = [_class_of(float(v), cuts) for v in ref.to_numpy()]
    clim = [classes.count(c) / len(classes) for c in ("cold", "average", "warm")]
    reasons = []
    if not hc.msss_climatology > 0:
        reasons.append(f"its cross-validated skill score against climatology is "
                       f"{hc.msss_climatology:.2f}, not positive")
    if np.isfinite(q) and q > q_max:
        reasons.append(f"its q-value {q:.2f} is above {q_max:g}")
    colder_low = cuts.direction == "lower"
    out: dict = {"year": year, "winter": year - lag, "lag": lag, "predictor": best,
                 "basis": "climatology" if reasons else "regression",
                 "reason": "; ".join(reasons), "confidence": confidence}
    if reasons:
        lo_q, hi_q = (0.5 - confidence / 2.0), (0.5 + confidence / 2.0)
        s_ref = np.sort(ref.to_numpy(float))
        pp = (np.arange(1, len(s_ref) + 1) - 0.5) / len(s_ref)
        out.update(predicted=float(np.mean(s_ref)), lo=float(np.interp(lo_q, pp, s_ref)),
                   hi=float(np.interp(hi_q, pp, s_ref)), p_cold=clim[0], p_average=clim[1],
                   p_warm=clim[2])
    else:
        s = hc.rmse
        zc = float(ndtri(0.5 + confidence / 2.0))
        p_low = float(ndtr((cuts.low - pred) / s))
        p_high = float(ndtr((pred - cuts.high) / s))
        out.update(predicted=pred, lo=pred - zc * s, hi=pred + zc * s,
                   p_cold=p_low if colder_low else p_high, p_average=1.0 - p_low - p_high,
                   p_warm=p_high if colder_low else p_low)
    alpha = 1.0 - confidence
    out.update(climatology=clim, cuts=cuts.to_dict(), hindcast_rmse=hc.rmse,
               msss_climatology=hc.msss_climatology, q_value=q, q_max=q_max,
               p_beats_persistence=p_beats,
               beats_persistence=bool(np.isfinite(p_beats) and p_beats < alpha),
               lags_considered=list(hc.lags))
    if year in target.index and np.isfinite(target[year]):
        v = float(target[year])
        out["observed"] = v
        out["observed_class"] = _class_of(v, cuts)
    return out


def skill_and_outlook(predictors: pd.DataFrame, target: pd.Series, lags: list[int],
                      cuts: Cuts, confidence: float = 0.9,
                      reference: tuple[int, int] | None = None, leave_out: int = 3,
                      outlook_lag: int | None = None, q_max: float = 0.1
                      ) -> tuple[pd.DataFrame, Hindcast, dict]:
    """The skill stage, one way for ``coldindex skill`` and the update.

    The skill table over every requested lag; the hindcast choosing predictor
    and lag inside its folds from all of them (or only ``outlook_lag``); the
    outlook (:func:`outlook`).

    Returns
    -------
    tuple
        ``(table, hindcast, outlook)``.
    """
    if outlook_lag is not None and outlook_lag not in lags:
        raise InputError(f"{{option}} {outlook_lag} is not among the lags "
                         f"{', '.join(map(str, lags))}; add it to the lags.",
                         option=("skill", "outlook_lag"))
    if not 0 < q_max <= 1:
        raise InputError(f"{{option}} needs to be in (0, 1], got: {q_max}.",
                         option=("skill", "outlook_q_max"))
    table = skill_table(predictors, target, lags, confidence, reference)
    hc = hindcast(predictors, target, lags if outlook_lag is None else [outlook_lag],
                  leave_out)
    ol = outlook(predictors, target, hc, cuts, confidence, table, q_max, reference)
    return table, hc, ol


def outlook_sentence(o: dict, column: str) -> str:
    """One sentence for the terminal and the report (two when the year is observed)."""
    ice = f"{o['predictor'].replace('ice_', '').replace('_', ' ')} ice"
    pers = (f"Against persistence, the ice {'beats' if o['beats_persistence'] else 'does not beat'}"
            f" it (Williams' t, one-sided p = {o['p_beats_persistence']:.2f})."
            if o.get("p_beats_persistence") == o.get("p_beats_persistence") else
            "Whether the ice beats persistence could not be tested.")
    probs = (f"P(cold) = {o['p_cold']:.2f}, P(average) = {o['p_average']:.2f}, "
             f"P(warm) = {o['p_warm']:.2f}")
    if o.get("basis") == "climatology":
        text = (f"For {column} in {o['year']} the outlook is climatological: the best ice "
                f"predictor ({ice} at lag {o['lag']}) has no demonstrable skill "
                f"({o['reason']}), so the outlook gives the reference period's class "
                f"frequencies, {probs}; {o['confidence']:.0%} range {o['lo']:.3g} to "
                f"{o['hi']:.3g}. {pers}")
    else:
        most = max(("cold", o["p_cold"]), ("average", o["p_average"]),
                   ("warm", o["p_warm"]), key=lambda t: t[1])
        text = (f"From the {ice} of winter {o['winter']} (lag {o['lag']}), {column} in "
                f"{o['year']} is forecast at {o['predicted']:.3g} ({o['confidence']:.0%} "
                f"interval {o['lo']:.3g} to {o['hi']:.3g}); {probs}, most likely {most[0]}. "
                f"{pers}")
    if "observed" in o:
        text += (f" That year's survey is already observed: {o['observed']:.3g} "
                 f"({o['observed_class']}); a true outlook is run after the winter, before "
                 "the survey.")
    return text
