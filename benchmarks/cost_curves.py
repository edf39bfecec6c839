"""Cost curves of one survey year on the exact (serial) path (issue 15, item 5).

Time and peak memory of one year's work against the number of casts, of grid
cells and of conditional simulations, each measured in a fresh process, with
the fitted growth exponent (the slope of log time against log size). The year's
work is split into its stages:

* **fit** — the REML fit of an exponential variogram (coarse grid, quasi-Newton
  polish), as ``coldindex index`` does every year (skipped above ``--fit-max``
  casts, where the dense path fits a subsample);
* **krige** — the kriging factor, estimate and variance at every cell and the
  leave-one-out errors;
* **simulate** — ``--sims`` conditional realizations (no parameter draws) and their
  area and mean summaries.

Kriging and simulations use fixed parameters (exponential, sill 0.8 °C², length 120 km,
nugget 0.04 °C²) at every size, so every point takes the circulant simulation.

Synthetic inputs (invented): a 760 x 760 km square, casts uniform over it, values a
smooth random field (random Fourier features, length about 120 km) plus noise; the
cells are a regular grid over the square. Peak memory is the process's maximum
resident set; ``base`` is that of the same process after its imports, before any
work.

Run:
    OPENBLAS_NUM_THREADS=1 python benchmarks/cost_curves.py              # all three axes
    OPENBLAS_NUM_THREADS=1 python benchmarks/cost_curves.py --axis sims --repeats 3
    OPENBLAS_NUM_THREADS=1 python benchmarks/cost_curves.py --max-casts 2000 --max-cells 200000
"""

from __future__ import annotations

import argparse
import json
import resource
import statistics
import subprocess
import sys
import time

import numpy as np

SIDE_KM = 760.0
AXES = {
    "casts": [100, 200, 500, 1000, 2000, 5000],
    "cells": [5_000, 20_000, 50_000, 100_000, 200_000, 500_000],
    "sims": [0, 50, 100, 200, 500, 1000],
}
#: The fixed sizes of the other axes (the issue's synthetic year: 430 casts, a 5 km grid).
DEFAULTS = {"casts": 430, "cells": 23_104, "sims": 200}


def _point(casts: int, cells: int, sims: int, fit_max: int, seed: int) -> dict[str, float]:
    from coldindex.fitting import fit_variogram
    from coldindex.interpolate import Kriging, Variogram, conditional_realizations

    base = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    rng = np.random.default_rng(seed)
    xy = rng.uniform(0.0, SIDE_KM, (casts, 2))
    w = rng.normal(0.0, 1.0 / 120.0, (40, 2))
    phase = rng.uniform(0, 2 * np.pi, 40)
    z = 1.0 + 0.2 * np.cos(xy @ w.T + phase).sum(axis=1) + rng.normal(0, 0.2, casts)
    side = int(round(np.sqrt(cells)))
    cell_km = SIDE_KM / side
    g = cell_km * (np.arange(side) + 0.5)
    xx, yy = np.meshgrid(g, g)
    cell_xy = np.column_stack([xx.ravel(), yy.ravel()])
    mask = np.ones((side, side), bool)
    area = np.full(mask.sum(), cell_km**2)
    out = {"base_mb": base, "cells": float(mask.sum())}
    t = time.perf_counter()
    if casts <= fit_max:
        fit_variogram(xy, z, "exponential", method="reml")
        out["fit_s"] = time.perf_counter() - t
    else:
        out["fit_s"] = float("nan")
    # Kriging and simulations with the field's own parameters, the same at every size (a
    # fitted length scale would move between the circulant and the exact simulation).
    vg = Variogram("exponential", 0.8, 120.0, 0.04)
    t = time.perf_counter()
    kr = Kriging(xy, z, vg)
    kr.predict(cell_xy)
    kr.loo()
    out["krige_s"] = time.perf_counter() - t
    t = time.perf_counter()
    if sims > 0:
        real = conditional_realizations(kr, g, g, mask, area, sims,
                                        np.random.default_rng([seed, 1]))
        real.summaries([0.0, 2.0])
    out["sim_s"] = time.perf_counter() - t
    out["maxrss_mb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    return out


def measure(casts: int, cells: int, sims: int, fit_max: int, repeats: int) -> dict[str, float]:
    """Median stage times [s] over fresh processes, largest peak memory [MB]."""
    runs = []
    for r in range(repeats):
        res = subprocess.run([sys.executable, __file__, "_point", str(casts), str(cells),
                              str(sims), str(fit_max), str(15 + r)], check=True,
                             capture_output=True, text=True)
        runs.append(json.loads(res.stdout.strip().splitlines()[-1]))
    med = {k: statistics.median(r[k] for r in runs) for k in ("fit_s", "krige_s", "sim_s")}
    med["maxrss_mb"] = max(r["maxrss_mb"] for r in runs)
    med["base_mb"] = min(r["base_mb"] for r in runs)
    med["cells"] = runs[0]["cells"]
    return med


def slope(x: list[float], y: list[float]) -> float:
    """Least-squares slope of log y on log x over the finite, positive points."""
    pts = [(a, b) for a, b in zip(x, y, strict=True) if a > 0 and b > 0 and np.isfinite(b)]
    if len(pts) < 2:
        return float("nan")
    lx, ly = np.log([p[0] for p in pts]), np.log([p[1] for p in pts])
    return float(np.polyfit(lx, ly, 1)[0])


def main() -> None:
    if len(sys.argv) > 1 and sys.argv[1] == "_point":
        print(json.dumps(_point(*(int(a) for a in sys.argv[2:7]))))
        return
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--axis", choices=[*AXES, "all"], default="all")
    ap.add_argument("--repeats", type=int, default=1)
    ap.add_argument("--fit-max", type=int, default=2000,
                    help="largest number of casts fitted by REML (above: the dense path)")
    ap.add_argument("--max-casts", type=int, default=5000, help="largest number of casts")
    ap.add_argument("--max-cells", type=int, default=500_000, help="largest number of cells")
    ap.add_argument("--max-sims", type=int, default=1000, help="largest number of simulations")
    args = ap.parse_args()
    for axis in AXES if args.axis == "all" else [args.axis]:
        top = {"casts": args.max_casts, "cells": args.max_cells, "sims": args.max_sims}[axis]
        sizes = [v for v in AXES[axis] if v <= top]
        rows = []
        for v in sizes:
            kw = dict(DEFAULTS, **{axis: v})
            rows.append((v, measure(kw["casts"], kw["cells"], kw["sims"], args.fit_max,
                                    args.repeats)))
        fixed = ", ".join(f"{k} {DEFAULTS[k]:,}" for k in DEFAULTS if k != axis)
        print(f"\n### {axis} ({fixed}; exponential variogram; {args.repeats} repeat(s))\n")
        print(f"| {axis} | cells | fit s | krige s | simulate s | total s | peak MB | "
              "work MB |")
        print("|---|---|---|---|---|---|---|---|")
        for v, m in rows:
            total = np.nansum([m["fit_s"], m["krige_s"], m["sim_s"]])
            fit = "—" if np.isnan(m["fit_s"]) else f"{m['fit_s']:.3f}"
            print(f"| {v:,} | {m['cells']:,.0f} | {fit} | {m['krige_s']:.3f} | "
                  f"{m['sim_s']:.3f} | {total:.3f} | {m['maxrss_mb']:.0f} | "
                  f"{m['maxrss_mb'] - m['base_mb']:.0f} |")
        x = [float(v) for v, _ in rows]
        parts = [f"{name} {slope(x, [m[key] for _, m in rows]):.2f}"
                 for name, key in (("fit", "fit_s"), ("krige", "krige_s"),
                                   ("simulate", "sim_s"))]
        mem = slope(x, [m["maxrss_mb"] - m["base_mb"] for _, m in rows])
        print(f"\nGrowth exponents (log-log slope against {axis}): {', '.join(parts)}; "
              f"work memory {mem:.2f}")


if __name__ == "__main__":
    main()
