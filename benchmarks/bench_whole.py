"""Whole-process benchmark (issue 15, item 1): coldindex index against a pykrige pipeline.

Everything runs as separate processes, in one run of this script, on one synthetic
multi-year survey (invented: a 17° x 6.4° box across 180° at about 65° S, 5 km
cells, casts uniform over the box, an exponential field with a nugget):

* **ratio A** = ``coldindex index --sims 0`` (fixed variogram, no parameter draws)
  over ``benchmarks/peer_pykrige.py`` (pykrige ``OrdinaryKriging``, vectorized, same
  family and parameters, same cells, same areas and mean, one table). Both read
  the casts, krige every year onto the grid, compute the areas and write.
* **ratio B** = (``--sims N`` minus ``--sims 0``) per year, over the median time of
  one warmed-up GSTools ``CondSRF`` realization on the same grid (realizations
  2..k after one discarded).

Fixed variogram parameters: the coldindex runs give them on the command line
(``--variogram FAMILY --variogram-params SILL,LEN_KM,NUGGET --param-draws 0``), so no
year is fitted; ``--workers`` sets the worker processes of those runs (default 1, like
the single-process peer).

Peak memory is each process's maximum resident set (``getrusage(RUSAGE_CHILDREN)``
in a small wrapper process around it). Figures are medians of ``--repeats`` runs.

``--sample`` times the documented commands on the committed sample instead:
``coldindex index sample_inputs/casts.csv ...`` with its defaults and ``coldindex demo``.

Run:
    OPENBLAS_NUM_THREADS=1 python benchmarks/bench_whole.py --years 44 --casts 430
    OPENBLAS_NUM_THREADS=1 python benchmarks/bench_whole.py --sample
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
#: The invented survey box (lon/lat) and the field's model.
BOX = (171.5, -67.9, 188.5, -61.5)
FAMILY, SILL, LEN_KM, NUGGET, MEAN_C = "exponential", 0.8, 120.0, 0.04, 1.0


def build_survey(folder: Path, years: int, casts: int, grid_km: float, seed: int) -> dict:
    """Write casts.csv and domain.geojson (coldindex), peer_casts.csv and cells.npz (peer)."""
    import pandas as pd
    from scipy.spatial.distance import cdist
    from shapely.geometry import box

    from coldindex.domain import domain_from_polygon, make_grid
    from coldindex.interpolate import Variogram

    dom = domain_from_polygon(box(*BOX))
    grid = make_grid(dom, grid_km)
    vg = Variogram(FAMILY, SILL, LEN_KM, NUGGET)
    minx, miny, maxx, maxy = dom.polygon_xy.bounds
    rng = np.random.default_rng(seed)
    frames = []
    for k in range(years):
        year = 1980 + k
        xy = np.empty((0, 2))
        while len(xy) < casts:  # uniform over the domain polygon
            cand = rng.uniform([minx, miny], [maxx, maxy], (2 * casts, 2))
            lon, lat = dom.to_lonlat(cand[:, 0], cand[:, 1])
            xy = np.vstack([xy, cand[dom.contains(lon, lat)]])
        xy = xy[:casts]
        K = vg.covariance(cdist(xy, xy)) + NUGGET * np.eye(casts)
        z = MEAN_C + np.linalg.cholesky(K) @ rng.standard_normal(casts)
        lon, lat = dom.to_lonlat(xy[:, 0], xy[:, 1])
        frames.append(pd.DataFrame({
            "year": year, "station": [f"B{year}-{i:04d}" for i in range(casts)],
            "date": [f"{year}-01-{1 + i % 28:02d}" for i in range(casts)],
            "lat": np.round(lat, 5), "lon": np.round(lon, 5),
            "bottom_c": np.round(np.maximum(z, -1.5), 4), "x_km": xy[:, 0], "y_km": xy[:, 1]}))
    df = pd.concat(frames, ignore_index=True)
    folder.mkdir(parents=True, exist_ok=True)
    df.drop(columns=["x_km", "y_km"]).to_csv(folder / "casts.csv", index=False)
    # The peer gets the same casts already projected (coldindex re-projects the rounded
    # lon/lat: differences of metres) and the same active cells with their areas.
    df[["year", "x_km", "y_km", "bottom_c"]].to_csv(folder / "peer_casts.csv", index=False)
    cxy = grid.active_xy()
    np.savez(folder / "cells.npz", x_km=cxy[:, 0], y_km=cxy[:, 1], area_km2=grid.active_area())
    (folder / "domain.geojson").write_text(json.dumps(dom.to_geojson()))
    return {"cells": int(grid.mask.sum()), "shape": grid.mask.shape, "gx": grid.x.tolist(),
            "gy": grid.y.tolist()}


def measured(cmd: list[str], repeats: int) -> tuple[float, float]:
    """Median wall time [s] and largest peak resident memory [MB] of a command's processes."""
    times, peaks = [], []
    for _ in range(repeats):
        res = subprocess.run([sys.executable, __file__, "_measure", *cmd], check=True,
                             capture_output=True, text=True)
        info = json.loads(res.stdout.strip().splitlines()[-1])
        times.append(info["wall_s"])
        peaks.append(info["maxrss_mb"])
    return statistics.median(times), max(peaks)


def _measure(cmd: list[str]) -> None:
    start = time.perf_counter()
    res = subprocess.run(cmd, capture_output=True, text=True)
    wall = time.perf_counter() - start
    if res.returncode != 0:
        sys.stderr.write(res.stdout + res.stderr)
        raise SystemExit(f"command failed ({res.returncode}): {' '.join(cmd)}")
    peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024  # kB on Linux
    print(json.dumps({"wall_s": wall, "maxrss_mb": peak}))


def _condsrf(argv: list[str]) -> None:
    """Seconds of GSTools CondSRF realizations on one year's casts (first one discarded)."""
    import gstools as gs
    import pandas as pd

    casts, grid_json, k = argv[0], argv[1], int(argv[2])
    g = json.loads(Path(grid_json).read_text())
    df = pd.read_csv(casts)
    one = df[df["year"] == df["year"].min()]
    model = gs.Exponential(dim=2, var=SILL, len_scale=LEN_KM, nugget=NUGGET)
    krige = gs.krige.Ordinary(model, (one["x_km"].to_numpy(), one["y_km"].to_numpy()),
                              one["bottom_c"].to_numpy(), exact=False, pseudo_inv=False)
    srf = gs.CondSRF(krige)
    srf.set_pos((np.asarray(g["gx"]), np.asarray(g["gy"])), "structured")
    times = []
    for seed in range(k):
        start = time.perf_counter()
        srf(seed=seed)
        times.append(time.perf_counter() - start)
    print(json.dumps({"times_s": times}))


def _coldindex(work: Path, sims: int, workers: int, name: str) -> list[str]:
    return [sys.executable, "-m", "coldindex.cli", "index", str(work / "casts.csv"),
            "--out", str(work / name), "--domain", str(work / "domain.geojson"),
            "--variogram", FAMILY, "--variogram-params", f"{SILL},{LEN_KM},{NUGGET}",
            "--param-draws", "0", "--sims", str(sims), "--workers", str(workers)]


def run_ratios(args: argparse.Namespace) -> None:
    work = Path(tempfile.mkdtemp(prefix="coldindex-bench-"))
    try:
        info = build_survey(work, args.years, args.casts, 5.0, args.seed)
        (work / "grid.json").write_text(json.dumps(info))
        print(f"{args.years} years x {args.casts} casts, {info['cells']} active cells "
              f"({info['shape'][0]} x {info['shape'][1]}), {FAMILY} sill {SILL} len {LEN_KM} "
              f"km nugget {NUGGET}, {args.repeats} repeats; load average at the start "
              f"{os.getloadavg()[0]:.1f} (figures are provisional unless the machine is idle)\n")
        peer = [sys.executable, str(HERE / "peer_pykrige.py"), str(work / "peer_casts.csv"),
                str(work / "cells.npz"), str(work / "peer.csv"), "--family", FAMILY,
                "--sill", str(SILL), "--len-km", str(LEN_KM), "--nugget", str(NUGGET)]
        t_peer, m_peer = measured(peer, args.repeats)
        t0, m0 = measured(_coldindex(work, 0, args.workers, "sims0"), args.repeats)
        t1, m1 = measured(_coldindex(work, args.sims, args.workers, "simsN"), args.repeats)
        res = subprocess.run([sys.executable, __file__, "_condsrf", str(work / "peer_casts.csv"),
                              str(work / "grid.json"), str(args.condsrf)], check=True,
                             capture_output=True, text=True)
        srf_times = json.loads(res.stdout.strip().splitlines()[-1])["times_s"]
        t_srf = statistics.median(srf_times[1:])
        per_year = (t1 - t0) / args.years
        print("| run | wall s | peak MB |")
        print("|---|---|---|")
        print(f"| peer: pykrige pipeline (`peer_pykrige.py`) | {t_peer:.2f} | {m_peer:.0f} |")
        print(f"| coldindex index --sims 0 (fixed variogram) | {t0:.2f} | {m0:.0f} |")
        print(f"| coldindex index --sims {args.sims} (fixed variogram, no draws) | {t1:.2f} | "
              f"{m1:.0f} |")
        print(f"| GSTools CondSRF, one warmed realization (median of {len(srf_times) - 1}) | "
              f"{t_srf:.3f} | |")
        print(f"\nratio A = coldindex --sims 0 / pykrige pipeline = {t0 / t_peer:.2f} "
              "(target <= 0.5, moonshot 0.33)")
        print(f"ratio B = ({args.sims} simulations a year: {per_year:.3f} s) / (one CondSRF "
              f"realization: {t_srf:.3f} s) = {per_year / t_srf:.2f} (target <= 1, moonshot 0.5)")
        import pandas as pd

        a = pd.read_csv(work / "peer.csv")
        b = pd.read_csv(work / "sims0" / "indices.csv")
        same = a.merge(b, on="year", suffixes=("", "_c"))
        same = same[same["n_casts"] == same["n_casts_c"]]  # years without spatial outliers
        d_mean = float(np.max(np.abs(same["bottom_mean_c"] - same["bottom_mean_c_c"])))
        d_area = float(np.max(np.abs(same["below_0c_km2"] - same["below_0c_km2_c"])
                              / np.maximum(same["below_0c_km2"], 1.0)))
        print(f"agreement with the peer in the {len(same)} years where coldindex flagged no "
              f"spatial outlier: mean within {d_mean:.1e} °C, area below 0 °C within "
              f"{d_area:.1e} (relative; the casts' lon/lat are rounded to 1e-5 degrees)")
        print(f"load average at the end {os.getloadavg()[0]:.1f}")
    finally:
        if not args.keep:
            shutil.rmtree(work, ignore_errors=True)
        else:
            print(f"kept {work}")


def run_sample(args: argparse.Namespace) -> None:
    work = Path(tempfile.mkdtemp(prefix="coldindex-sample-"))
    s = ROOT / "sample_inputs"
    try:
        index = [sys.executable, "-m", "coldindex.cli", "index", str(s / "casts.csv"), "--out",
                 str(work / "index"), "--domain", str(s / "domain.geojson"), "--bathymetry",
                 str(s / "bathymetry.nc")]
        demo = [sys.executable, "-m", "coldindex.cli", "demo", str(work / "demo")]
        print("| command | wall s | peak MB | budget |")
        print("|---|---|---|---|")
        for label, cmd, budget, wipe in (("coldindex index (sample, defaults)", index, "30 s",
                                          work / "index"),
                                         ("coldindex demo", demo, "60 s", work / "demo")):
            times, peak = [], 0.0
            for _ in range(args.repeats):
                shutil.rmtree(wipe, ignore_errors=True)
                t, m = measured(cmd, 1)
                times.append(t)
                peak = max(peak, m)
            print(f"| {label} | {statistics.median(times):.1f} | {peak:.0f} | {budget} |")
    finally:
        shutil.rmtree(work, ignore_errors=True)


def main() -> None:
    if len(sys.argv) > 1 and sys.argv[1] in ("_measure", "_condsrf"):
        mode, rest = sys.argv[1], sys.argv[2:]
        {"_measure": _measure, "_condsrf": _condsrf}[mode](rest)
        return
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--years", type=int, default=44)
    ap.add_argument("--casts", type=int, default=430)
    ap.add_argument("--sims", type=int, default=500)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--condsrf", type=int, default=5, help="CondSRF realizations (first dropped)")
    ap.add_argument("--seed", type=int, default=15)
    ap.add_argument("--workers", type=int, default=1, help="worker processes of coldindex")
    ap.add_argument("--sample", action="store_true", help="time the sample's index and demo")
    ap.add_argument("--keep", action="store_true", help="keep the synthetic survey's folder")
    args = ap.parse_args()
    if args.sample:
        run_sample(args)
    else:
        run_ratios(args)


if __name__ == "__main__":
    main()
