"""The peer pipeline of the whole-process benchmark: a plain pykrige index run.

What a user without coldindex would write for the same job, on the same inputs:
read the casts, krige each year onto the same grid with pykrige's
``OrdinaryKriging`` (``backend="vectorized"``) under the same fixed variogram
family and parameters, compute the same expected and map areas below the
thresholds and the area-weighted mean, and write one table. Run as its own
process by ``benchmarks/bench_whole.py``; the variance pykrige reports is that
of a new noisy value, so the nugget is subtracted for the smooth field's SD, as
coldindex maps it.

Inputs (written by ``bench_whole.py``): a casts CSV with ``year``, ``x_km``,
``y_km``, ``bottom_c`` (the casts projected to the same equal-area plane), and
an ``.npz`` of the active cells (``x_km``, ``y_km``, ``area_km2``).

Run: python benchmarks/peer_pykrige.py CASTS.csv CELLS.npz OUT.csv \
        --family exponential --sill 0.8 --len-km 120 --nugget 0.04 --thresholds 2,0
"""

from __future__ import annotations

import argparse

import numpy as np
import pandas as pd
from pykrige.ok import OrdinaryKriging
from scipy.special import ndtr

#: pykrige's range for a coldindex/GSTools length scale: pykrige writes exp(-3 h / range)
#: for the exponential (so range = 3 len) and uses the range as the support otherwise.
#: Source: pykrige.variogram_models (exponential_variogram_model, spherical_variogram_model).
RANGE_PER_LEN = {"exponential": 3.0, "spherical": 1.0}


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("casts")
    ap.add_argument("cells")
    ap.add_argument("out")
    ap.add_argument("--family", default="exponential", choices=sorted(RANGE_PER_LEN))
    ap.add_argument("--sill", type=float, required=True)
    ap.add_argument("--len-km", type=float, required=True)
    ap.add_argument("--nugget", type=float, required=True)
    ap.add_argument("--thresholds", default="2,0")
    args = ap.parse_args(argv)
    thresholds = [float(t) for t in args.thresholds.split(",")]
    casts = pd.read_csv(args.casts)
    cells = np.load(args.cells)
    cx, cy, area = cells["x_km"], cells["y_km"], cells["area_km2"]
    params = {"psill": args.sill, "range": RANGE_PER_LEN[args.family] * args.len_km,
              "nugget": args.nugget}
    rows = []
    for year, g in casts.groupby("year", sort=True):
        ok = OrdinaryKriging(g["x_km"].to_numpy(float), g["y_km"].to_numpy(float),
                             g["bottom_c"].to_numpy(float), variogram_model=args.family,
                             variogram_parameters=params)
        est, var = ok.execute("points", cx, cy, backend="vectorized")
        est = np.asarray(est, float)
        sd = np.sqrt(np.maximum(np.asarray(var, float) - args.nugget, 0.0))
        row = {"year": int(year), "n_casts": len(g),
               "bottom_mean_c": float(np.sum(area * est) / np.sum(area))}
        for t in thresholds:
            with np.errstate(divide="ignore", invalid="ignore"):
                p = np.where(sd > 0, ndtr((t - est) / np.where(sd > 0, sd, 1.0)),
                             (est < t).astype(float))
            row[f"below_{t:g}c_km2"] = float(np.sum(area * p))
            row[f"below_{t:g}c_km2_map"] = float(np.sum(area * (est < t)))
        rows.append(row)
    pd.DataFrame(rows).to_csv(args.out, index=False)


if __name__ == "__main__":
    main()
