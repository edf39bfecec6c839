"""Size and power of the regime-shift test, by the warp-speed bootstrap (not a timed test).

Synthetic series of n = 50 years, white noise or AR(1) with lag-1 autocorrelation 0.5
(marginal SD 1), with no step (size) or a step of 1, 2 or 3 marginal SDs (power), the
step at mid-series (the 26th year is the first of the new regime) or at a year drawn
uniformly from [cutoff, n - cutoff] (the 11th to the 41st year); and a temporary regime:
2 marginal SDs from the 18th to the 34th year (17 years), then back. Every series goes
through the package's own machinery with default settings (``ShiftsConfig()``): the
detector, the shift statistics (``regimes.shift_t_statistics``), the AR(1) null fitted
to the series (``regimes.lag1_rows``, ``regimes.null_series``) and the min-p combination
(``regimes.combined_p_values``).

Warp-speed bootstrap (Giacomini, Politis & White 2013, Econometric Theory 29, 567-589):
a full bootstrap nested in the Monte Carlo (999 null series per synthetic series) is too
slow, so each synthetic series gets ONE bootstrap replicate, simulated from the null
fitted to that series; the replicates of all series of a cell, pooled, form the null
distribution against which each series' statistics are compared. A series counts as a
detection when it has a shift whose p-value is below 0.05.

Columns, per method:

* ``test``: the shift test as shipped (local and whole-record GLS t under AR(1) errors,
  combined by min-p);
* ``previous``: the statistic shipped before, the two-sample t of the adjacent regimes
  with effective sizes (``regimes.shift_statistics``, rho from ``lag1_rows``), same
  detections, same warp-speed null;
* ``known rho``: the shipped test with the TRUE lag-1 autocorrelation in place of the
  estimates, in the GLS fits and in the null's AR(1): what the same detector and
  statistics could reach if the series' persistence were known;
* ``no test``: share of series in which the detector reports any shift at all.

``--full-series K --full-boot B`` adds a check of the warp-speed figures: K series per
cell through ``detect_shifts`` itself, each with its own full bootstrap of B replicates,
for the size and the 2-SD mid-series power.

Run: python benchmarks/shift_size_power.py [--series 2000] [--seed 2026] [--noise ar1]
     [--prewhiten mpk]
     [--full-series 300 --full-boot 199]
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from coldindex.config import ShiftsConfig
from coldindex.regimes import (
    combined_p_values,
    detect_rows,
    detect_shifts,
    lag1_rows,
    null_series,
    p_values,
    prewhiten,
    shift_statistics,
    shift_t_statistics,
)
from coldindex.stats import simulate_ar1

N = 50
LEVEL = 0.05
METHODS = ("stars", "pelt")
EPISODE = (17, 34)  # the temporary regime: the 18th to the 34th year


def statistics(X: np.ndarray, method: str, opts: ShiftsConfig, rho: float | None = None
               ) -> tuple[np.ndarray, np.ndarray]:
    """Largest (local, whole-record) t pair and largest previous statistic of every row.

    ``rho``: a known lag-1 autocorrelation in place of the estimates (GLS fits only).
    """
    starts = detect_rows(X, method, opts)
    local, record = shift_t_statistics(X, starts, rho)
    new = np.array([[a.max(initial=0.0), b.max(initial=0.0)]
                    for a, b in zip(local, record, strict=True)]).reshape(len(X), 2)
    rhos = lag1_rows(X, opts.null_window)
    prev = np.array([shift_statistics(x, s, r).max(initial=0.0)
                     for x, s, r in zip(X, starts, rhos, strict=True)])
    return new, prev


def rejection_rate(t: np.ndarray, null: np.ndarray) -> float:
    """Share of series with a shift whose warp-speed p-value is below LEVEL.

    ``t`` and ``null`` are (B,) for one statistic, or (B, J) for several combined by min-p.
    """
    if t.ndim == 1:
        return float(np.mean((t > 0) & (p_values(t, null) < LEVEL)))
    return float(np.mean((t.max(axis=1) > 0) & (combined_p_values(t, null) < LEVEL)))


def series(phi: float, step: float, where: str, size: int, rng: np.random.Generator,
           cutoff: int) -> np.ndarray:
    X = simulate_ar1(phi, N, size, rng)
    if step and where == "episode":
        X[:, EPISODE[0]:EPISODE[1]] += step
    elif step:
        first = (np.full(size, N // 2) if where == "mid"
                 else rng.integers(cutoff, N - cutoff + 1, size))
        X += step * (np.arange(N)[None, :] >= first[:, None])
    return X


def cell(phi: float, step: float, where: str, size: int, seed: list[int],
         opts: ShiftsConfig) -> dict[str, float]:
    rng = np.random.default_rng(np.random.SeedSequence(seed))
    X = series(phi, step, where, size, rng, opts.cutoff)
    phis = lag1_rows(X, opts.null_window)
    # Warp speed: one replicate per series, from the null fitted to that series.
    boot = np.vstack([null_series(N, float(p), opts, rng, 1) for p in phis])
    known = null_series(N, phi, opts, rng, size)
    if opts.prewhiten != "none":  # the detector sees the prewhitened series, as in the package
        sub = opts.subsample or max(5, (opts.cutoff + 1) // 3)
        X = np.array([prewhiten(x, opts.prewhiten, sub)[0] for x in X])
    out = {}
    for m in METHODS:
        t_new, t_prev = statistics(X, m, opts)
        b_new, b_prev = statistics(boot, m, opts)
        out[f"{m} test"] = rejection_rate(t_new, b_new)
        out[f"{m} any"] = float(np.mean(t_new.max(axis=1) > 0))
        out[f"{m} previous"] = rejection_rate(t_prev, b_prev)
        # Known rho describes the raw series; after prewhitening it has no meaning.
        out[f"{m} known"] = (float("nan") if opts.prewhiten != "none" else
                             rejection_rate(statistics(X, m, opts, phi)[0],
                                            statistics(known, m, opts, phi)[0]))
    out["median phi"] = float(np.median(phis))
    return out


def full_bootstrap(phi: float, step: float, size: int, boot: int, seed: list[int],
                   opts: ShiftsConfig) -> dict[str, float]:
    """Share of series with a shift of p < LEVEL, each series with its own bootstrap."""
    rng = np.random.default_rng(np.random.SeedSequence(seed))
    X = series(phi, step, "mid", size, rng, opts.cutoff)
    years = np.arange(1971, 1971 + N)
    hits = dict.fromkeys(METHODS, 0)
    for i, x in enumerate(X):
        res = detect_shifts(years, x, METHODS, opts.model_copy(update=dict(boot=boot, seed=i)))
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
    ap.add_argument("--noise", choices=("white", "ar1", "both"), default="both",
                    help="noise of the warp-speed table's cells")
    ap.add_argument("--prewhiten", choices=("none", "mpk", "ip4"), default="none",
                    help="ShiftsConfig.prewhiten for the warp-speed table")
    args = ap.parse_args()
    opts = ShiftsConfig(prewhiten=args.prewhiten)
    cases = [("none", 0.0, "mid")] + [(f"{s:g} SD, mid-series", s, "mid") for s in (1, 2, 3)]
    cases += [(f"{s:g} SD, uniform in [{opts.cutoff}, {N - opts.cutoff}]", s, "uniform")
              for s in (1, 2, 3)]
    cases += [(f"2 SD, temporary (years {EPISODE[0] + 1}-{EPISODE[1]})", 2.0, "episode")]
    phis = {"white": (0.0,), "ar1": (0.5,), "both": (0.0, 0.5)}[args.noise]
    if args.series > 0:
        print(f"{args.series} series per cell, n = {N}, default settings (prewhiten = "
              f"{args.prewhiten}), warp-speed bootstrap, detection = any shift with p < "
              f"{LEVEL}.\n")
        print("| noise | step | STARS test | STARS previous | STARS known rho | "
              "STARS no test | PELT test | PELT previous | PELT known rho | PELT no test | "
              "median fitted rho |")
        print("|---|---|---|---|---|---|---|---|---|---|---|")
        t0 = time.perf_counter()
        for phi in phis:
            i = int(phi > 0)
            for k, (name, step, where) in enumerate(cases):
                r = cell(phi, step, where, args.series, [args.seed, i, k], opts)
                noise = "white" if phi == 0 else f"AR(1) {phi:g}"
                cols = [f"{r[f'{m} {k}']:.1%}" if np.isfinite(r[f"{m} {k}"]) else "-"
                        for m in METHODS for k in ("test", "previous", "known", "any")]
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
