"""Size and power of the regime-shift test, by the warp-speed bootstrap (not a timed test).

Synthetic series of n = 50 years, white noise or AR(1) with lag-1 autocorrelation 0.5
(marginal SD 1), with no step (size) or a step of 1, 2 or 3 marginal SDs (power), the
step at mid-series (the 26th year is the first of the new regime) or at a year drawn
uniformly from [cutoff, n - cutoff] (the 11th to the 41st year). Every series goes
through the package's own machinery with default settings (``ShiftOptions()``): the
detector, the shift statistic (``regimes.shift_statistics``), the AR(1) null fitted to
the series (``regimes.lag1_rows``, ``regimes.null_series``).

Warp-speed bootstrap (Giacomini, Politis & White 2013, Econometric Theory 29, 567-589):
a full bootstrap nested in the Monte Carlo (999 null series per synthetic series) is too
slow, so each synthetic series gets ONE bootstrap replicate, simulated from the null
fitted to that series; the replicates of all series of a cell, pooled, form the null
distribution against which each series' largest shift statistic is compared. A series
counts as a detection when it has a shift whose p-value is below 0.05.

Columns, per method:

* ``test``: the shift test as shipped (two-sample t with effective regime sizes);
* ``old statistic``: the earlier statistic, |mean after - mean before| / noise scale
  (1.4826 MAD of first differences / sqrt 2), same detections, same warp-speed null;
* ``no test``: share of series in which the detector reports any shift at all;
* ``known rho``: the shipped statistic with the TRUE lag-1 autocorrelation in place of the
  estimate, both in the statistic's effective sizes and in the null's AR(1): what the same
  detector and statistic could reach if the series' persistence were known.

``--full-series K --full-boot B`` adds a check of the warp-speed figures: K series per
cell through ``detect_shifts`` itself, each with its own full bootstrap of B replicates,
for the size and the 2-SD mid-series power.

Run: python benchmarks/shift_size_power.py [--series 2000] [--seed 2026]
     [--full-series 300 --full-boot 199]
"""

from __future__ import annotations

import argparse
import dataclasses
import time

import numpy as np

from coldindex.regimes import (
    ShiftOptions,
    detect_rows,
    detect_shifts,
    lag1_rows,
    null_series,
    p_values,
    shift_statistics,
)
from coldindex.stats import robust_sd, simulate_ar1

N = 50
LEVEL = 0.05
METHODS = ("stars", "pelt")


def old_statistic(x: np.ndarray, starts: list[int]) -> float:
    """The statistic before issue 12: largest |step| / robust noise scale, lengths ignored."""
    if not starts:
        return 0.0
    edges = [0, *starts, len(x)]
    means = [x[a:b].mean() for a, b in zip(edges[:-1], edges[1:], strict=True)]
    sd = robust_sd(x)
    return float(np.max(np.abs(np.diff(means)))) / sd if sd > 0 else 0.0


def statistics(X: np.ndarray, method: str, opts: ShiftOptions, rho: float | None = None
               ) -> tuple[np.ndarray, np.ndarray]:
    """Largest shipped and old statistic of every row (0 without a shift).

    ``rho``: a known lag-1 autocorrelation in place of each row's estimate.
    """
    rhos = lag1_rows(X, opts.null_window) if rho is None else np.full(len(X), rho)
    starts = detect_rows(X, method, opts)
    new = np.array([shift_statistics(x, s, r).max(initial=0.0)
                    for x, s, r in zip(X, starts, rhos, strict=True)])
    old = np.array([old_statistic(x, s) for x, s in zip(X, starts, strict=True)])
    return new, old


def rejection_rate(t: np.ndarray, null: np.ndarray) -> float:
    """Share of series with a shift (t > 0) whose warp-speed p-value is below LEVEL."""
    return float(np.mean((t > 0) & (p_values(t, null) < LEVEL)))


def series(phi: float, step: float, where: str, size: int, rng: np.random.Generator,
           cutoff: int) -> np.ndarray:
    X = simulate_ar1(phi, N, size, rng)
    if step:
        first = (np.full(size, N // 2) if where == "mid"
                 else rng.integers(cutoff, N - cutoff + 1, size))
        X += step * (np.arange(N)[None, :] >= first[:, None])
    return X


def cell(phi: float, step: float, where: str, size: int, seed: list[int],
         opts: ShiftOptions) -> dict[str, float]:
    rng = np.random.default_rng(np.random.SeedSequence(seed))
    X = series(phi, step, where, size, rng, opts.cutoff)
    phis = lag1_rows(X, opts.null_window)
    # Warp speed: one replicate per series, from the null fitted to that series.
    boot = np.vstack([null_series(N, float(p), opts, rng, 1) for p in phis])
    known = null_series(N, phi, opts, rng, size)
    out = {}
    for m in METHODS:
        t_new, t_old = statistics(X, m, opts)
        b_new, b_old = statistics(boot, m, opts)
        out[f"{m} test"] = rejection_rate(t_new, b_new)
        out[f"{m} any"] = float(np.mean(t_new > 0))
        out[f"{m} old"] = rejection_rate(t_old, b_old)
        out[f"{m} known"] = rejection_rate(statistics(X, m, opts, phi)[0],
                                           statistics(known, m, opts, phi)[0])
    out["median phi"] = float(np.median(phis))
    return out


def full_bootstrap(phi: float, step: float, size: int, boot: int, seed: list[int],
                   opts: ShiftOptions) -> dict[str, float]:
    """Share of series with a shift of p < LEVEL, each series with its own bootstrap."""
    rng = np.random.default_rng(np.random.SeedSequence(seed))
    X = series(phi, step, "mid", size, rng, opts.cutoff)
    years = np.arange(1971, 1971 + N)
    hits = dict.fromkeys(METHODS, 0)
    for i, x in enumerate(X):
        res = detect_shifts(years, x, METHODS, dataclasses.replace(opts, boot=boot, seed=i))
        for m in METHODS:
            p = res.shifts.loc[res.shifts["method"] == m, "p_value"]
            hits[m] += bool((p < LEVEL).any())
    return {m: h / size for m, h in hits.items()}


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--series", type=int, default=2000,
                    help="series per cell (0 = skip the warp-speed table)")
    ap.add_argument("--seed", type=int, default=2026)
    ap.add_argument("--full-series", type=int, default=0,
                    help="series per cell of the full-bootstrap check (0 = skip it)")
    ap.add_argument("--full-boot", type=int, default=199,
                    help="bootstrap replicates per series in the full-bootstrap check")
    args = ap.parse_args()
    opts = ShiftOptions()
    cases = [("none", 0.0, "mid")] + [(f"{s:g} SD, mid-series", s, "mid") for s in (1, 2, 3)]
    cases += [(f"{s:g} SD, uniform in [{opts.cutoff}, {N - opts.cutoff}]", s, "uniform")
              for s in (1, 2, 3)]
    if args.series > 0:
        print(f"{args.series} series per cell, n = {N}, default settings, warp-speed bootstrap, "
              f"detection = any shift with p < {LEVEL}.\n")
        print("| noise | step | STARS test | STARS old statistic | STARS known rho | "
              "STARS no test | PELT test | PELT old statistic | PELT known rho | PELT no test | "
              "median fitted rho |")
        print("|---|---|---|---|---|---|---|---|---|---|---|")
        t0 = time.perf_counter()
        for i, phi in enumerate((0.0, 0.5)):
            for k, (name, step, where) in enumerate(cases):
                r = cell(phi, step, where, args.series, [args.seed, i, k], opts)
                noise = "white" if phi == 0 else f"AR(1) {phi:g}"
                cols = [f"{r[f'{m} {k}']:.1%}" for m in METHODS
                        for k in ("test", "old", "known", "any")]
                print(f"| {noise} | {name} | {' | '.join(cols)} | {r['median phi']:.2f} |",
                      flush=True)
        se = np.sqrt(LEVEL * (1 - LEVEL) / args.series)
        print(f"\nMonte Carlo SE of a 5 % rate: {se:.1%}; wall time "
              f"{time.perf_counter() - t0:.0f} s.")
    if args.full_series > 0:
        print(f"\nCheck: {args.full_series} series per cell, each with its own bootstrap of "
              f"{args.full_boot} replicates (detect_shifts).\n")
        print("| noise | step | STARS | PELT |")
        print("|---|---|---|---|")
        t0 = time.perf_counter()
        for i, phi in enumerate((0.0, 0.5)):
            for k, step in enumerate((0.0, 2.0)):
                r = full_bootstrap(phi, step, args.full_series, args.full_boot,
                                   [args.seed, 100 + i, k], opts)
                noise = "white" if phi == 0 else f"AR(1) {phi:g}"
                name = "none" if step == 0 else f"{step:g} SD, mid-series"
                print(f"| {noise} | {name} | {r['stars']:.1%} | {r['pelt']:.1%} |", flush=True)
        se = np.sqrt(LEVEL * (1 - LEVEL) / args.full_series)
        print(f"\nMonte Carlo SE of a 5 % rate: {se:.1%}; wall time "
              f"{time.perf_counter() - t0:.0f} s.")


if __name__ == "__main__":
    main()
