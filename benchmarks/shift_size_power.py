"""Size and power of the whole-detection red-noise bootstrap (not a timed test).

Size: AR(1) series (rho = 0.5, n = 50) with no shift. Power: the same with a step of
1.5 (or 3) marginal SDs after year 25. For each series: default settings, ``--boot`` replicates;
a series counts as a detection when any shift has p < 0.1.

Run: python benchmarks/shift_size_power.py [--series 200] [--boot 99] [--steps 1.5 3]
"""

from __future__ import annotations

import argparse

import numpy as np

from coldindex.regimes import ShiftOptions, detect_shifts, stars
from coldindex.stats import simulate_ar1


def rates(X: np.ndarray, boot: int) -> dict[str, float]:
    years = np.arange(1971, 1971 + X.shape[1])
    hits = {"stars": 0, "pelt": 0}
    for i, x in enumerate(X):
        res = detect_shifts(years, x, opts=ShiftOptions(boot=boot, seed=i))
        for m in hits:
            p = res.shifts.loc[res.shifts["method"] == m, "p_value"]
            hits[m] += bool((p < 0.1).any())
    out = {m: h / len(X) for m, h in hits.items()}
    out["plain stars"] = float(np.mean([len(stars(x)[0]) > 0 for x in X]))
    return out


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--series", type=int, default=200)
    ap.add_argument("--boot", type=int, default=99)
    ap.add_argument("--steps", type=float, nargs="*", default=[1.5, 3.0])
    args = ap.parse_args()
    cases = [("size (no shift)", 0.0)] + [(f"power ({s:g} SD step)", s) for s in args.steps]
    for k, (name, size) in enumerate(cases):
        X = simulate_ar1(0.5, 50, args.series, np.random.default_rng(2026 + k))
        X[:, 25:] += size
        r = rates(X, args.boot)
        print(f"| {name} | {r['stars']:.1%} | {r['pelt']:.1%} | {r['plain stars']:.1%} |")


if __name__ == "__main__":
    main()
