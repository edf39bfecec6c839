"""Ratio benchmarks: kriging and conditional simulation against pykrige and GSTools.

One synthetic survey year: 400 casts over 800 x 780 km, a 5 km grid (about
25,000 cells), an exponential variogram with a nugget. Every library gets the
same inputs in the same process; the figure reported is the median wall time
of repeated runs, and the ratio peer / ours.

Run: python benchmarks/bench_kriging.py [--repeats 5]
"""

from __future__ import annotations

import argparse
import resource
import statistics
import time

import numpy as np

from coldindex.interpolate import Kriging, Variogram, conditional_realizations


def timed(func, repeats: int) -> tuple[float, object]:
    times, out = [], None
    for _ in range(repeats):
        t = time.perf_counter()
        out = func()
        times.append(time.perf_counter() - t)
    return statistics.median(times), out


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--repeats", type=int, default=5)
    ap.add_argument("--sims", type=int, default=500)
    args = ap.parse_args()

    rng = np.random.default_rng(1)
    xy = rng.uniform(0, 800, (400, 2))
    z = np.sin(xy[:, 0] / 120) + np.cos(xy[:, 1] / 90) + rng.normal(0, 0.2, 400)
    gx = np.arange(2.5, 800, 5.0)
    gy = np.arange(2.5, 780, 5.0)
    xx, yy = np.meshgrid(gx, gy)
    cells = np.column_stack([xx.ravel(), yy.ravel()])
    vg = Variogram("exponential", 0.8, 120.0, 0.04)
    print(f"casts: {len(z)}, grid cells: {len(cells)} ({len(gy)} x {len(gx)})")

    t_ours, (est, var, _) = timed(lambda: Kriging(xy, z, vg).predict(cells), args.repeats)

    from pykrige.ok import OrdinaryKriging

    def pyk():
        ok = OrdinaryKriging(xy[:, 0], xy[:, 1], z, variogram_model="exponential",
                             variogram_parameters={"psill": 0.8, "range": 360.0,
                                                   "nugget": 0.04})
        return ok.execute("points", cells[:, 0], cells[:, 1], backend="vectorized")

    t_pyk, (pk_est, pk_var) = timed(pyk, args.repeats)

    import gstools as gs

    model = gs.Exponential(dim=2, var=0.8, len_scale=120.0, nugget=0.04)

    def gst():
        k = gs.krige.Ordinary(model, (xy[:, 0], xy[:, 1]), z, exact=False, pseudo_inv=False)
        return k((cells[:, 0], cells[:, 1]), return_var=True)

    t_gst, (gs_est, gs_var) = timed(gst, args.repeats)
    assert np.allclose(est, pk_est, atol=1e-8) and np.allclose(est, gs_est, atol=1e-8)
    assert np.allclose(var, np.asarray(pk_var) - 0.04, atol=1e-8)

    print("\n| task | coldindex s | peer | peer s | peer / coldindex |")
    print("|---|---|---|---|---|")
    print(f"| OK estimate + variance | {t_ours:.3f} | pykrige vectorized | {t_pyk:.3f} | "
          f"{t_pyk / t_ours:.1f}x |")
    print(f"| OK estimate + variance | {t_ours:.3f} | GSTools Ordinary | {t_gst:.3f} | "
          f"{t_gst / t_ours:.1f}x |")

    mask = np.ones(xx.shape, bool)
    kr = Kriging(xy, z, vg)

    def ours_sim():
        return conditional_realizations(kr, gx, gy, mask, np.full(mask.sum(), 1.0), args.sims,
                                        np.random.default_rng(np.random.SeedSequence([1, 2])))

    t_sim, real = timed(ours_sim, max(1, args.repeats // 2))

    def gs_sim():
        k = gs.krige.Ordinary(model, (xy[:, 0], xy[:, 1]), z, exact=False, pseudo_inv=False)
        srf = gs.CondSRF(k)
        srf.set_pos((gx, gy), "structured")
        return srf(seed=3)

    t_gsim, _ = timed(gs_sim, max(1, args.repeats // 2))
    print(f"| {args.sims} conditional realizations | {t_sim:.3f} | GSTools CondSRF, 1 "
          f"realization | {t_gsim:.3f} | {t_gsim / t_sim:.2f}x (per realization "
          f"{t_gsim * args.sims / t_sim:.0f}x) |")
    print(f"\nsimulation method {real.method}, clipped share {real.clipped_share:.1e}")
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"peak resident memory of the whole benchmark process: {peak:.0f} MB")


if __name__ == "__main__":
    main()
