"""Peak memory of `coldindex ice` on a year of daily fields, against loading them whole.

Writes one year of invented daily ice concentration and floe thickness on a 25 km
south polar stereographic grid of hemispheric size (332 x 316 cells, like the
usual passive-microwave grid), then runs, each in its own process:

* ``coldindex ice`` with a shelf region (lazy, a month of time steps at a time);
* a plain xarray reduction that loads both variables whole and sums over the
  same cells (the naive way).

and reports the peak resident memory (``ru_maxrss`` of the child) of each.

    python benchmarks/ice_fields_memory.py [--days 365] [--keep DIR]
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd
import pyproj
import xarray as xr

NAIVE = """
import sys, numpy as np, xarray as xr
ds = xr.open_dataset(sys.argv[1]).load()
c = ds["siconc"].values / 100.0
h = ds["sithick"].values
print(float(np.nansum(c[:, 100:140, 150:190])), float(np.nansum((c * h)[:, 100:140, 150:190])))
"""


def write_year(path: Path, days: int) -> None:
    """A year of daily fields on a 25 km south polar stereographic grid, packed int16."""
    cf = {"grid_mapping_name": "polar_stereographic",
          "straight_vertical_longitude_from_pole": 0.0, "latitude_of_projection_origin": -90.0,
          "standard_parallel": -70.0, "false_easting": 0.0, "false_northing": 0.0,
          "semi_major_axis": 6378273.0, "semi_minor_axis": 6356889.449}
    x = (np.arange(316) - 158 + 0.5) * 25000.0
    y = (np.arange(332) - 166 + 0.5) * 25000.0
    X, Y = np.meshgrid(x, y)
    r = np.hypot(X, Y) / 1000.0
    time = pd.date_range("2021-01-01", periods=days, freq="D")
    season = 0.5 + 0.5 * np.sin(2 * np.pi * (np.arange(days) - 100) / 365.0)
    edge = 1500.0 + 1500.0 * season[:, None, None]
    conc = (100.0 * np.clip((edge - r[None]) / 300.0, 0.0, 1.0)).astype("float32")
    thick = np.where(conc > 0, 0.5 + 0.001 * (edge - r[None]).clip(0), np.nan).astype("float32")
    crs = pyproj.CRS.from_cf(cf)
    lon, lat = pyproj.Transformer.from_crs(crs, crs.geodetic_crs, always_xy=True).transform(X, Y)
    ds = xr.Dataset(
        {"siconc": (("time", "y", "x"), conc, {"standard_name": "sea_ice_area_fraction",
                                               "units": "%", "grid_mapping": "crs"}),
         "sithick": (("time", "y", "x"), thick, {"standard_name": "sea_ice_thickness",
                                                 "units": "m", "grid_mapping": "crs",
                                                 "cell_methods": "area: mean where sea_ice"}),
         "crs": ((), np.int32(0), cf)},
        coords={"time": time, "x": ("x", x, {"standard_name": "projection_x_coordinate",
                                             "units": "m"}),
                "y": ("y", y, {"standard_name": "projection_y_coordinate", "units": "m"}),
                "lat": (("y", "x"), lat, {"standard_name": "latitude",
                                          "units": "degrees_north"}),
                "lon": (("y", "x"), lon, {"standard_name": "longitude",
                                          "units": "degrees_east"})})
    enc = {v: {"dtype": "int16", "scale_factor": 0.01, "_FillValue": np.int16(-32768),
               "zlib": True, "complevel": 1} for v in ("siconc", "sithick")}
    ds.to_netcdf(path, encoding=enc)


def peak_mb(cmd: list[str]) -> float:
    """Run a command in a fresh child process; the peak resident memory of its child. [MB]"""
    probe = ("import resource, subprocess, sys; subprocess.run(sys.argv[1:], check=True, "
             "capture_output=True); print(resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss)")
    out = subprocess.run([sys.executable, "-c", probe, *cmd], check=True, capture_output=True,
                         text=True)
    return float(out.stdout.strip()) / 1024.0


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--days", type=int, default=365)
    ap.add_argument("--keep", type=Path, default=None)
    args = ap.parse_args()
    work = args.keep or Path(tempfile.mkdtemp(prefix="ice-mem-"))
    work.mkdir(parents=True, exist_ok=True)
    fields = work / "daily.nc"
    if not fields.exists():
        write_year(fields, args.days)
    region = work / "shelf.geojson"
    ring = [[60.0, -68.0], [75.0, -68.0], [75.0, -64.0], [60.0, -64.0], [60.0, -68.0]]
    region.write_text(json.dumps({"type": "Feature", "properties": {"name": "shelf"},
                                  "geometry": {"type": "Polygon", "coordinates": [ring]}}))
    ours = peak_mb([sys.executable, "-m", "coldindex.cli", "ice", str(fields), "--regions",
                    str(region), "--out", str(work / "out")])
    naive = peak_mb([sys.executable, "-c", NAIVE, str(fields)])
    size = fields.stat().st_size / 1e6
    cells = 332 * 316 * args.days
    print(f"{args.days} daily fields, {cells / 1e6:.1f} M cell-days, file {size:.0f} MB")
    print(f"coldindex ice peak RSS: {ours:.0f} MB")
    print(f"naive whole-load peak RSS: {naive:.0f} MB")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
