"""Gridded projection path: peak memory and throughput against a plain xarray reduction.

Generates (once) a synthetic daily NetCDF of several GB under benchmarks/results/:
``--models`` models x ``--years`` years of daily bottom temperature on a 100 x 100
lon/lat grid covering the sample shelf (float32, kelvin, one file per model), and a
synthetic observed fields.nc on the sample domain. Then, each in its own process under
``/usr/bin/time -v``:

* ``coldindex project FILES --fields fields.nc --var tob --adjust delta`` (season mean,
  interpolation onto the survey grid, per-cell adjustment, indices, projection);
* the peer: ``xr.open_dataset(f, chunks={"time": 365})["tob"].mean().compute()`` per file
  (chunks aligned with the file's own).

Throughput = bytes of the model files / wall seconds. Run:
python benchmarks/bench_gridded.py [--models 3] [--years 100]
"""

from __future__ import annotations

import argparse
import re
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd

OUT = Path(__file__).resolve().parent / "results" / "gridded"


def make_inputs(models: int, years: int) -> list[Path]:
    from shapely.geometry import Polygon

    from coldindex.demo import SHELF
    from coldindex.domain import domain_from_polygon, make_grid
    from coldindex.io.writers import fields_dataset, write_netcdf

    OUT.mkdir(parents=True, exist_ok=True)
    dom = domain_from_polygon(Polygon(SHELF))
    grid = make_grid(dom, 5.0)
    lat = grid.lat[grid.mask]
    obs_years = list(range(1982, 2026))
    obs = np.array([1.0 + 0.4 * (lat - 60.5) + 0.03 * (y - 1982) for y in obs_years])
    casts = pd.DataFrame({"year": [1982], "lat": [60.5], "lon": [180.0], "bottom_c": [1.0]})
    write_netcdf(fields_dataset(obs_years, obs, np.full_like(obs, 0.2), [2.0, 0.0], grid, dom,
                                casts), OUT / "fields.nc")
    lon = np.linspace(168.0, 194.0, 100)
    la = np.linspace(56.5, 64.5, 100)
    files = []
    for m in range(models):
        path = OUT / f"model{m}.nc"
        files.append(path)
        if path.exists():
            continue
        import netCDF4

        with netCDF4.Dataset(path, "w") as nc:
            nc.setncattr("model", f"M{m}")
            nc.setncattr("scenario", "high")
            nc.createDimension("time", None)
            nc.createDimension("lat", 100)
            nc.createDimension("lon", 100)
            t = nc.createVariable("time", "f8", ("time",))
            t.units = "days since 1982-01-01"
            t.calendar = "noleap"
            nc.createVariable("lat", "f8", ("lat",))[:] = la
            nc.createVariable("lon", "f8", ("lon",))[:] = lon
            v = nc.createVariable("tob", "f4", ("time", "lat", "lon"), chunksizes=(365, 100, 100))
            v.units = "K"
            rng = np.random.default_rng(m)
            base = 273.15 + 1.0 + 0.4 * (la[:, None] - 60.5) + np.zeros((1, 100))
            for y in range(years):
                days = np.arange(365)
                cycle = np.cos(2 * np.pi * (days - 200) / 365)[:, None, None]
                block = base[None] + cycle + 0.03 * y + 0.2 * m + rng.normal(0, 0.3, (365, 1, 1))
                t[y * 365:(y + 1) * 365] = y * 365 + days
                v[y * 365:(y + 1) * 365] = block.astype("float32")
    return files


def timed(cmd: list[str]) -> tuple[float, float]:
    start = time.perf_counter()
    res = subprocess.run(["/usr/bin/time", "-v", *cmd], capture_output=True, text=True)
    wall = time.perf_counter() - start
    if res.returncode != 0:
        sys.exit(res.stdout + res.stderr)
    rss = float(re.search(r"Maximum resident set size \(kbytes\): (\d+)", res.stderr).group(1))
    return wall, rss / 1024


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--models", type=int, default=3)
    ap.add_argument("--years", type=int, default=100)
    args = ap.parse_args()
    files = make_inputs(args.models, args.years)
    size = sum(p.stat().st_size for p in files)
    obs = OUT / "obs.csv"
    pd.DataFrame({"year": range(1982, 2026),
                  "bottom_mean_c": [1.0 + 0.03 * k for k in range(44)]}).to_csv(obs, index=False)
    ours = [sys.executable, "-m", "coldindex.cli", "project", *map(str, files), "--observed",
            str(obs), "--value", "bottom_mean_c", "--out", str(OUT / "release"), "--fields",
            str(OUT / "fields.nc"), "--var", "tob", "--adjust", "delta"]
    peer_code = ("import sys, xarray as xr\n"
                 "for f in sys.argv[1:]:\n"
                 "    xr.open_dataset(f, chunks={'time': 365})['tob'].mean().compute()\n")
    peer = [sys.executable, "-c", peer_code, *map(str, files)]
    t_peer, m_peer = timed(peer)
    t_ours, m_ours = timed(ours)
    gb = size / 1e9
    print(f"files: {len(files)} x {args.years} years daily 100x100 float32, {gb:.2f} GB")
    print("| run | wall s | throughput GB/s | peak RSS MB |")
    print("|---|---|---|---|")
    print(f"| plain xarray mean (peer) | {t_peer:.1f} | {gb / t_peer:.3f} | {m_peer:.0f} |")
    print(f"| coldindex project --fields | {t_ours:.1f} | {gb / t_ours:.3f} | {m_ours:.0f} |")
    print(f"throughput ratio ours / peer: {t_peer / t_ours:.2f}")


if __name__ == "__main__":
    main()
