"""Dense surveys and fine grids (issue 15 items 3 and 4): time, peak memory, accuracy.

Modes (each size runs in a fresh process, so its peak resident memory is its own):

* ``year --casts N``: one synthetic survey year of N casts spread uniformly over the
  sample's domain, run through ``compute_indices`` as shipped (5 km grid, REML fit,
  200 conditional simulations over 20 parameter draws); prints time and peak memory.
* ``accuracy --casts N``: the same year, exact kriging against the dense path with
  the same variogram parameters: max |difference| of the map over cells, max relative
  difference of the map's SD, of the expected areas (share of the domain), of the
  leave-one-out errors, and of the simulations' ``_sd`` (same seed, point estimate).
* ``threshold``: exact against local kriging (map, SD and LOO alone) at 250..3000 casts;
  ``year --threshold T`` forces a whole year down either path, the measurement behind
  ``coldindex.dense.DENSE_THRESHOLD``.
* ``fine --grid-km G [--years K]``: the sample's casts, domain and bathymetry on a grid
  of G km (1 km: 134,883 cells; 0.535 km: 469,847 cells), through ``compute_indices``
  and ``fields.nc``; prints time and peak memory.
* ``all``: every figure of benchmarks/README.md, each in its own process.

Run: OPENBLAS_NUM_THREADS=1 python benchmarks/bench_dense.py all
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import tempfile
import time
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

ROOT = Path(__file__).resolve().parents[1]
SAMPLE = ROOT / "sample_inputs"
THRESHOLDS = (2.0, 0.0)


def peak_mb() -> float:
    """Peak resident memory of this process. [MB]"""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def sample_domain():
    from coldindex.io.readers import read_domain

    return read_domain(SAMPLE / "domain.geojson")


def synthetic_year(domain, n: int, seed: int = 15) -> pd.DataFrame:
    """N casts uniform over the domain; a smooth field (random Fourier features) plus noise.

    The field has a correlation length near 80 km and an SD near 0.7 °C around 0.5 °C,
    with 0.01 °C² of measurement noise (the sample's fits: sill 0.35 °C², nugget
    0.01 °C², length scales 60-120 km).
    """
    import shapely

    rng = np.random.default_rng(seed)
    poly = domain.polygon_xy
    minx, miny, maxx, maxy = poly.bounds
    pts = np.empty((0, 2))
    while len(pts) < n:
        cand = rng.uniform((minx, miny), (maxx, maxy), (2 * n, 2))
        pts = np.vstack([pts, cand[shapely.contains_xy(poly, cand[:, 0], cand[:, 1])]])
    xy = pts[:n]
    k = 300
    freq = rng.standard_cauchy((k, 2)) / 80.0  # Cauchy frequencies: exponential-like field
    phase = rng.uniform(0, 2 * np.pi, k)
    field = np.sqrt(2.0 / k) * np.cos(xy @ freq.T + phase).sum(axis=1)
    z = 0.5 + 0.6 * field + rng.normal(0.0, 0.1, n)
    lon, lat = domain.to_lonlat(xy[:, 0], xy[:, 1])
    return pd.DataFrame({"row": np.arange(1, n + 1), "year": 2030,
                         "station": [f"S{i:05d}" for i in range(n)], "lat": lat, "lon": lon,
                         "bottom_c": z, "doy": 200.0, "date": "2030-07-19"})


def options(**kw):
    from coldindex.config import IndexOptions

    base: dict[str, Any] = dict(grid_km=5.0, variogram="exponential", thresholds=THRESHOLDS,
                                sims=200, param_draws=20, outlier_z=0.0, min_casts=30,
                                min_coverage=0.0)
    base.update(kw)
    return IndexOptions(**base)


def run_year(n: int, threshold: int | None = None) -> dict:
    from coldindex import dense
    from coldindex.domain import make_grid
    from coldindex.indices import compute_indices

    domain = sample_domain()
    casts = synthetic_year(domain, n)
    grid = make_grid(domain, 5.0)
    if threshold is not None:  # force a path: the year-level threshold measurement
        dense.DENSE_THRESHOLD = threshold
    t = time.perf_counter()
    res = compute_indices(casts, domain, grid, options())
    wall = time.perf_counter() - t
    row = res.table.iloc[0]
    return {"mode": "year", "casts": n, "threshold": dense.DENSE_THRESHOLD,
            "cells": int(grid.mask.sum()), "seconds": round(wall, 1),
            "peak_mb": round(peak_mb()), "variogram": row["variogram"],
            "simulation": row["simulation"], "note": row["note"]}


def run_accuracy(n: int) -> dict:
    from coldindex import dense
    from coldindex.domain import make_grid
    from coldindex.indices import area_below
    from coldindex.interpolate import Kriging

    domain = sample_domain()
    casts = synthetic_year(domain, n)
    grid = make_grid(domain, 5.0)
    cells, area = grid.active_xy(), grid.active_area()
    x, y = domain.to_xy(casts["lon"].to_numpy(), casts["lat"].to_numpy())
    xy = np.column_stack([x, y])
    z = casts["bottom_c"].to_numpy()
    fit = dense.fit_year(xy, z, "exponential", dense_threshold=0)
    vg = fit.variogram
    t = time.perf_counter()
    exact = Kriging(xy, z, vg)
    e1, v1, _ = exact.predict(cells)
    l1 = exact.loo()
    t_exact = time.perf_counter() - t
    t = time.perf_counter()
    local = dense.LocalKriging(xy, z, vg)
    e2, v2, _ = local.predict(cells)
    l2 = local.loo()
    t_local = time.perf_counter() - t
    assert v1 is not None and v2 is not None
    total = float(area.sum())
    d_area = max(abs(area_below(e1, np.sqrt(v1), area, t) - area_below(e2, np.sqrt(v2), area, t))
                 for t in THRESHOLDS) / total
    opts = options(param_draws=0)
    fit0 = replace(fit, posterior=None)
    s1 = dense.simulate_blocked(exact, fit0, xy, z, None, grid, cells, area, None, opts,
                                np.random.default_rng(1))
    s2 = dense.simulate_blocked(local, fit0, xy, z, None, grid, cells, area, None, opts,
                                np.random.default_rng(1))
    sd_rel = max([abs(np.std(s2.means) / np.std(s1.means) - 1)]
                 + [abs(np.std(s2.areas[:, j]) / np.std(s1.areas[:, j]) - 1)
                    for j in range(len(THRESHOLDS))])
    return {"mode": "accuracy", "casts": n, "cells": len(area), "variogram": vg.describe(),
            "max_abs_dmap_c": float(np.max(np.abs(e1 - e2))),
            "max_rel_dsd": float(np.max(np.abs(np.sqrt(v2 / v1) - 1))),
            "max_darea_share": d_area,
            "max_abs_dloo_c": float(np.max(np.abs(l1[0] - l2[0]))),
            "max_rel_dsims_sd": float(sd_rel), "sims_method": s1.method,
            "exact_s": round(t_exact, 1), "local_s": round(t_local, 1),
            "peak_mb": round(peak_mb())}


def run_threshold() -> list[dict]:
    from coldindex import dense
    from coldindex.domain import make_grid
    from coldindex.interpolate import Kriging, Variogram

    domain = sample_domain()
    grid = make_grid(domain, 5.0)
    cells = grid.active_xy()
    vg = Variogram("exponential", 0.35, 80.0, 0.01)
    out = []
    for n in (250, 500, 1000, 2000, 3000):
        casts = synthetic_year(domain, n)
        x, y = domain.to_xy(casts["lon"].to_numpy(), casts["lat"].to_numpy())
        xy = np.column_stack([x, y])
        z = casts["bottom_c"].to_numpy()
        row: dict[str, Any] = {"mode": "threshold", "casts": n}
        for name, make in (("exact", Kriging), ("local", dense.LocalKriging)):
            t = time.perf_counter()
            kr = make(xy, z, vg)
            kr.predict(cells)
            kr.loo()
            row[f"{name}_s"] = round(time.perf_counter() - t, 2)
        row["exact_matrices_mb"] = round(4 * 8 * n * n / 1e6)
        out.append(row)
    return out


def run_fine(grid_km: float, years: int) -> dict:
    from coldindex.domain import make_grid
    from coldindex.indices import compute_indices
    from coldindex.io import writers
    from coldindex.io.readers import read_bathymetry

    domain = sample_domain()
    casts = pd.read_csv(SAMPLE / "casts.csv", dtype={"date": str})
    keep = sorted(casts["year"].unique())[-years:] if years else None
    if keep is not None:
        casts = casts[casts["year"].isin(keep)]
    # What quality control would keep: inside the domain, with a bottom temperature.
    inside = domain.contains(casts["lon"].to_numpy(float), casts["lat"].to_numpy(float))
    casts = casts[inside & casts["bottom_c"].notna()].reset_index(drop=True)
    casts["row"] = np.arange(1, len(casts) + 1)
    casts["doy"] = pd.to_datetime(casts["date"]).dt.day_of_year.astype(float)
    # The sample straddles 180 degrees; its bathymetry's axis runs 174..187 degrees east.
    casts["lon"] = np.where(casts["lon"] < 0, casts["lon"] + 360.0, casts["lon"])
    t = time.perf_counter()
    grid = make_grid(domain, grid_km)
    t_grid = time.perf_counter() - t
    bathy = read_bathymetry(SAMPLE / "bathymetry.nc")
    t = time.perf_counter()
    res = compute_indices(casts, domain, grid, options(grid_km=max(grid_km, 1.0)),
                          bathymetry=bathy)
    t_index = time.perf_counter() - t
    t = time.perf_counter()
    with tempfile.TemporaryDirectory() as tmp:
        ds = writers.fields_dataset(res.years, res.estimate, res.sd, THRESHOLDS, grid,
                                    domain, res.casts)
        writers.write_netcdf(ds, Path(tmp) / "fields.nc")
        size = (Path(tmp) / "fields.nc").stat().st_size
    t_write = time.perf_counter() - t
    return {"mode": "fine", "grid_km": grid_km, "cells": int(grid.mask.sum()),
            "years": len(res.years), "grid_s": round(t_grid, 1),
            "index_s": round(t_index, 1), "fields_s": round(t_write, 1),
            "fields_mb": round(size / 1e6, 1), "peak_mb": round(peak_mb()),
            "simulation": sorted(set(res.table["simulation"].dropna()))}


def child(args: list[str]) -> list[dict]:
    """Run one mode in a fresh process; its JSON lines."""
    out = subprocess.run([sys.executable, __file__, *args], check=True, capture_output=True,
                         text=True)
    return [json.loads(line) for line in out.stdout.splitlines() if line.startswith("{")]


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("mode", choices=["year", "accuracy", "threshold", "fine", "all"])
    ap.add_argument("--casts", type=int, default=1000)
    ap.add_argument("--grid-km", type=float, default=1.0)
    ap.add_argument("--years", type=int, default=0, help="last K sample years (0 = all)")
    ap.add_argument("--threshold", type=int, default=None,
                    help="year: casts above which the dense path runs (default: the shipped)")
    args = ap.parse_args()
    if args.mode == "year":
        rows = [run_year(args.casts, args.threshold)]
    elif args.mode == "accuracy":
        rows = [run_accuracy(args.casts)]
    elif args.mode == "threshold":
        rows = run_threshold()
    elif args.mode == "fine":
        rows = [run_fine(args.grid_km, args.years)]
    else:
        rows = child(["threshold"])
        for n in (1000, 3000, 5000):
            rows += child(["accuracy", "--casts", str(n)])
        for n in (1000, 5000, 20000):
            rows += child(["year", "--casts", str(n)])
        for n in (1000, 1500, 2000):  # the threshold: a whole year down either path
            for forced in ("100000", "500"):
                rows += child(["year", "--casts", str(n), "--threshold", forced])
        rows += child(["fine", "--grid-km", "1.0"])
        rows += child(["fine", "--grid-km", "0.535", "--years", "3"])
    for r in rows:
        print(json.dumps(r, default=str), flush=True)


if __name__ == "__main__":
    main()
