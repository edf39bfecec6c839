"""Stop year under AR(1) noise, and the outlook's no-skill fallback: calibration.

Part 1 — the stop year (``coldindex.project``). Truth by construction: an
expected value ``m(t) = a + b (t - 2000)`` over 1980-2100, stationary Gaussian
AR(1) noise of marginal SD 0.5 and lag-1 ``phi``, cold when the value is below
0, window 10 years, threshold 0.1. The documented quantity is the first window
start from which P(at least one cold year in the window) stays below 0.1;
its truth comes from brute-force simulation of the true process (200,000
series, unconditional). Each replicate model has ``members`` series; its stop
year is estimated two ways:

* ``old``: residual SD about the 30-year smoother with ddof 2, years treated as
  independent (the product formula) — the method before this change;
* ``new``: :func:`coldindex.project.ar1_noise` (marginal SD and lag-1 by the
  method of moments through the smoother's weights) and the AR(1) orthant
  probability (:func:`coldindex.project.prob_any_cold`).

Reported per cell: the truth; for each method the median estimate and its
error (censored estimates included: "none by the end" counts as later than
every year), the mean error and RMSE over the replicates with a stop year, and
the share with none by the end; and the mean of the new spread and lag-1
estimates.

Part 2 — the outlook (``coldindex.skill``): three monthly ice predictors
(independent AR(1) 0.5, unit SD) and their mean; the target of year Y is
``-s * mean(winter Y - 1) + AR(1) 0.5 noise of unit SD`` (skill at lag 1 only;
s = 0 is no skill; s = 1 and 2 give correlations of about 0.5 and 0.76), 44
training years, lags 0-2, leave-3-out, terciles. The next year (2026) is held
out and the outlook for it is judged: how often it is climatological, and the
mean Brier score of its three class probabilities against climatology's
(the reference class frequencies), over many independent series; beside it
the outlook before this change (first lag only, the best predictor, never
climatology).

Run: ``python benchmarks/stop_year_calibration.py [--reps N] [--outlook-reps N]
[--part stop|outlook|both]``
"""

from __future__ import annotations

import argparse

import numpy as np
import pandas as pd
from scipy.special import ndtr

from coldindex.classify import Cuts, cuts_by_rule
from coldindex.project import ar1_noise, local_linear, stop_year

YEARS = np.arange(1980, 2101)
SD = 0.5
WINDOW, P_STOP = 10, 0.1


def ar1(rng: np.random.Generator, n: int, k: int, phi: float) -> np.ndarray:
    e = np.empty((k, n))
    e[:, 0] = rng.normal(size=k)
    s = np.sqrt(1 - phi**2)
    for t in range(1, n):
        e[:, t] = phi * e[:, t - 1] + s * rng.normal(size=k)
    return SD * e


def truth_stop(m: np.ndarray, phi: float, rng: np.random.Generator, n: int = 200_000) -> int:
    cold = np.zeros((len(m) - WINDOW + 1,))
    for _ in range(n // 20_000):
        sims = m + ar1(rng, len(m), 20_000, phi) < 0
        c = np.cumsum(sims, axis=1)
        c = np.concatenate([np.zeros((sims.shape[0], 1)), c], axis=1)
        any_cold = (c[:, WINDOW:] - c[:, :-WINDOW]) > 0
        cold += any_cold.mean(axis=0)
    p_any = cold / (n // 20_000)
    ok = np.flatnonzero(p_any >= P_STOP)
    return int(YEARS[ok[-1] + 1])


def one_model(vals: np.ndarray) -> tuple[float, float, float, float]:
    """(old stop, new stop, new spread, new lag1); inf when none by the end."""
    M = vals.shape[0]
    yy = np.tile(YEARS, M)
    vv = vals.ravel()
    fit = local_linear(yy, vv, YEARS)
    resid = vv - np.tile(fit, M)
    s_old = np.sqrt(np.sum(resid**2) / (len(resid) - 2))
    old = stop_year(YEARS, ndtr(-fit / s_old), WINDOW, P_STOP)
    _, exp, s_new, phi = ar1_noise(yy, vv, np.repeat(np.arange(M), len(YEARS)))
    new = stop_year(YEARS, ndtr(-exp / s_new), WINDOW, P_STOP, phi)
    return (np.inf if old is None else old, np.inf if new is None else new, s_new, phi)


def stop_year_table(reps: int) -> pd.DataFrame:
    rows = []
    cells = [(0.6, 1, 0.0, 0.015), (0.6, 5, 0.0, 0.015), (0.6, 20, 0.0, 0.015),
             (0.6, 5, -1.0, 0.04), (0.0, 5, 0.0, 0.015), (0.0, 1, 0.0, 0.015)]
    for phi, members, a, b in cells:
        rng = np.random.default_rng([int(phi * 10), members, int(b * 1000)])
        m = a + b * (YEARS - 2000)
        truth = truth_stop(m, phi, rng)
        res = np.array([one_model(m + ar1(rng, len(YEARS), members, phi))
                        for _ in range(reps)])
        row = {"lag1": phi, "members": members, "trend": f"{a:+g}{b:+g}(t-2000)",
               "truth": truth}
        for k, name in ((0, "old"), (1, "new")):
            v = res[:, k]
            fin = v[np.isfinite(v)]
            row[f"{name}_median"] = int(np.median(v)) if np.isfinite(np.median(v)) else "none"
            row[f"{name}_median_error"] = float(np.median(v) - truth)
            row[f"{name}_mean_error"] = float(np.mean(fin) - truth)
            row[f"{name}_rmse"] = float(np.sqrt(np.mean((fin - truth) ** 2)))
            row[f"{name}_none"] = float(np.mean(~np.isfinite(v)))
        row["spread_mean"] = float(np.mean(res[:, 2]))
        row["lag1_mean"] = float(np.mean(res[:, 3]))
        rows.append(row)
    return pd.DataFrame(rows)


def outlook_table(reps: int) -> pd.DataFrame:
    from coldindex.skill import _choose_and_fit, _lagged_candidates, hindcast, skill_and_outlook

    def old_probs(preds: pd.DataFrame, target: pd.Series, cuts: Cuts) -> np.ndarray:
        """The outlook before this change: first lag (0), best |r| predictor, never climatology."""
        hc0 = hindcast(preds, target, 0, 3)
        X = _lagged_candidates(preds, [0])
        yrs = sorted(set(X.index[X.notna().any(axis=1)]) & set(target.index))
        (best, lag), slope, intercept, _ = _choose_and_fit(X.loc[yrs], target[yrs])
        pred = intercept + slope * float(X.loc[2026, (best, lag)])
        p_low = float(ndtr((cuts.low - pred) / hc0.rmse))
        p_high = float(ndtr((pred - cuts.high) / hc0.rmse))
        return np.array([p_low, 1 - p_low - p_high, p_high])

    years = np.arange(1982, 2026)
    rows = []
    for strength in (0.0, -1.0, -2.0):
        fallback = 0
        brier, brier_clim, brier_old = [], [], []
        for r in range(reps):
            rng = np.random.default_rng([7, r, int(-strength * 10)])
            n = len(years) + 1
            x = ar1(rng, n + 1, 3, 0.5) / SD            # winters 1981 .. 2026
            preds = pd.DataFrame({f"ice_m{k}": x[k] for k in range(3)},
                                 index=np.arange(1981, 2027))
            preds["ice_winter_mean"] = preds.mean(axis=1)
            # the target of year Y follows the winter mean of Y - 1 (lag 1) with this strength
            t = (strength * preds["ice_winter_mean"].reindex(np.arange(1982, 2027) - 1)
                 .to_numpy() + ar1(rng, n, 1, 0.5)[0] / SD)
            target = pd.Series(t[:-1], index=years)     # 2026 held out: judged on it
            cuts = cuts_by_rule(years, target.to_numpy(), "bottom_mean_c", "tercile")
            _, _, o = skill_and_outlook(preds.loc[:2025], target, [0, 1, 2], cuts,
                                        leave_out=3)
            # the outlook for 2026 needs winter 2026 (lag 0) or 2025 (lag 1, 2)
            if o["year"] != 2026:
                _, _, o = skill_and_outlook(preds, target, [0, 1, 2], cuts, leave_out=3)
            fallback += o["basis"] == "climatology"
            v = float(t[-1])
            obs_cls = "cold" if v < cuts.low else "warm" if v > cuts.high else "average"
            probs = np.array([o["p_cold"], o["p_average"], o["p_warm"]])
            onehot = np.array([obs_cls == c for c in ("cold", "average", "warm")], float)
            brier.append(float(np.sum((probs - onehot) ** 2)))
            brier_clim.append(float(np.sum((np.array(o["climatology"]) - onehot) ** 2)))
            brier_old.append(float(np.sum((old_probs(preds, target, cuts) - onehot) ** 2)))
        bc = float(np.mean(brier_clim))
        rows.append({"lag1_strength": abs(strength), "series": reps,
                     "climatological_outlooks": fallback / reps,
                     "brier_climatology": bc,
                     "brier_new": float(np.mean(brier)),
                     "bss_new": 1 - float(np.mean(brier)) / bc,
                     "brier_old": float(np.mean(brier_old)),
                     "bss_old": 1 - float(np.mean(brier_old)) / bc})
    return pd.DataFrame(rows)


def markdown(df: pd.DataFrame) -> str:
    """A pipe table (3 significant digits) without extra dependencies."""
    def fmt(v: object) -> str:
        if isinstance(v, (float, np.floating)):
            return "inf" if np.isinf(v) else f"{v:.3g}"
        return str(v)
    lines = ["| " + " | ".join(map(str, df.columns)) + " |",
             "|" + "---|" * len(df.columns)]
    lines += ["| " + " | ".join(fmt(v) for v in row) + " |" for row in df.itertuples(index=False)]
    return "\n".join(lines)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--reps", type=int, default=200)
    ap.add_argument("--outlook-reps", type=int, default=300)
    ap.add_argument("--part", choices=("stop", "outlook", "both"), default="both")
    args = ap.parse_args()
    if args.part in ("stop", "both"):
        print(markdown(stop_year_table(args.reps)))
        print()
    if args.part in ("outlook", "both"):
        print(markdown(outlook_table(args.outlook_reps)))


if __name__ == "__main__":
    main()
