"""Synthetic surveys whose truth is known by construction, for calibration checks.

A year is a Gaussian bottom-temperature field with a known covariance (the
smooth process), optionally around a linear function of depth, observed at
random casts with independent measurement error (the nugget). The truth that
the indices estimate is computed from the same draw of the field at the grid's
cell centres: ``sum(cell area * 1{field < T})`` and the area-weighted mean.
The field at the cells and at the casts is drawn jointly from the Cholesky
factor of their covariance, independently of the tool's own simulation code.

Used by ``tests/test_calibration.py`` (a fast check of the machinery) and
``benchmarks/calibration_areas.py`` (many years, several scenarios).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
import scipy.linalg as sla
from numpy.typing import NDArray
from scipy.spatial.distance import cdist

from coldindex.domain import Domain, Grid
from coldindex.interpolate import Variogram

FloatArray = NDArray[np.float64]


@dataclass(frozen=True)
class Scenario:
    """One synthetic survey design and field model.

    Attributes
    ----------
    variogram
        Covariance of the smooth process and the nugget of the casts.
    n_casts
        Casts a year, uniformly at random over the domain.
    mean_c
        Mean of the field (at the mean depth, with a drift). [°C]
    depth_slope
        Change of the mean per metre of depth (0 = no drift). [°C m⁻¹]
    """

    variogram: Variogram
    n_casts: int
    mean_c: float = 1.0
    depth_slope: float = 0.0


def linear_depth(lon: FloatArray, lat: FloatArray, lon0: float) -> FloatArray:
    """An invented sea floor deepening linearly to the west and south. [m]

    Linear in longitude (unwrapped around ``lon0``) and latitude, so bilinear
    interpolation of it on any lon/lat grid is exact.
    """
    dlon = (np.asarray(lon, float) - lon0 + 180.0) % 360.0 - 180.0
    return 150.0 - 40.0 * dlon + 60.0 * (np.asarray(lat, float) + 62.0)


def bathymetry_grid(domain: Domain, step_deg: float = 0.25
                    ) -> tuple[FloatArray, FloatArray, FloatArray]:
    """The invented sea floor as a ``(lon_axis, lat_axis, depth)`` grid covering the domain."""
    minx, miny, maxx, maxy = domain.polygon_lonlat.bounds
    lon = np.arange(minx - 1.0, maxx + 1.0 + step_deg, step_deg)
    lat = np.arange(miny - 1.0, maxy + 1.0 + step_deg, step_deg)
    LON, LAT = np.meshgrid(lon, lat)
    return lon, lat, linear_depth(LON, LAT, domain.lon0)


def draw_year(domain: Domain, grid: Grid, scenario: Scenario, rng: np.random.Generator
              ) -> tuple[pd.DataFrame, FloatArray]:
    """Draw one year: casts (lon, lat, bottom_c) and the true field at the active cells.

    Parameters
    ----------
    domain, grid
        The survey domain and its grid.
    scenario
        Field model and design.
    rng
        Random generator.

    Returns
    -------
    tuple
        Casts frame (``lat``, ``lon``, ``bottom_c``, ``doy``) and the true smooth
        field at the active cells (row-major order of ``grid.mask``). [°C]
    """
    vg = scenario.variogram
    minx, miny, maxx, maxy = domain.polygon_xy.bounds
    xs: list[FloatArray] = []
    need = scenario.n_casts
    while need > 0:
        cand = rng.uniform([minx, miny], [maxx, maxy], size=(2 * need + 10, 2))
        lon, lat = domain.to_lonlat(cand[:, 0], cand[:, 1])
        inside = cand[domain.contains(lon, lat)][:need]
        xs.append(inside)
        need -= len(inside)
    cast_xy = np.vstack(xs)
    cell_xy = grid.active_xy()
    P = np.vstack([cell_xy, cast_xy])
    K = vg.covariance(cdist(P, P))
    K[np.diag_indices(len(P))] += 1e-10 * vg.sill
    field = sla.cholesky(K, lower=True) @ rng.standard_normal(len(P))
    lon, lat = domain.to_lonlat(cast_xy[:, 0], cast_xy[:, 1])
    m = len(cell_xy)
    mean = np.full(len(P), scenario.mean_c)
    if scenario.depth_slope:
        plon, plat = domain.to_lonlat(P[:, 0], P[:, 1])
        depth = linear_depth(plon, plat, domain.lon0)
        mean += scenario.depth_slope * (depth - depth[:m].mean())
    truth = mean[:m] + field[:m]
    obs = mean[m:] + field[m:] + np.sqrt(vg.nugget) * rng.standard_normal(len(cast_xy))
    casts = pd.DataFrame({"station": [f"R{i:04d}" for i in range(len(obs))], "lat": lat,
                          "lon": lon, "bottom_c": obs, "doy": np.full(len(obs), 30.0)})
    return casts, truth


def true_indices(truth: FloatArray, cell_area: FloatArray, thresholds: tuple[float, ...]
                 ) -> dict[str, float]:
    """The true mean [°C] and areas below each threshold [km²] of one year's field."""
    from coldindex.schema import area_column

    out = {"bottom_mean_c": float(truth @ cell_area / cell_area.sum())}
    for t in thresholds:
        out[area_column(t)] = float(cell_area[truth < t].sum())
    return out


def calibration_table(results: pd.DataFrame, truths: pd.DataFrame,
                      columns: list[str]) -> pd.DataFrame:
    """Coverage of the 90 % intervals and RMSE / RMS(sd) for each index column.

    Parameters
    ----------
    results
        The tool's ``indices.csv`` rows (one a year).
    truths
        The true values (one row a year, same order, same column names).
    columns
        Index columns to judge, e.g. ``bottom_mean_c``, ``below_0c_km2``.

    Returns
    -------
    pandas.DataFrame
        One row a column: ``coverage90`` (share of years whose ``_lo90``..``_hi90``
        holds the truth), ``rmse_over_sd`` (RMSE of the headline against the
        truth over the root-mean-square of ``_sd``) and ``years``.
    """
    rows = []
    for c in columns:
        ok = results[c].notna().to_numpy() & results[f"{c}_sd"].notna().to_numpy()
        est = results[c].to_numpy(float)[ok]
        tru = truths[c].to_numpy(float)[ok]
        lo = results[f"{c}_lo90"].to_numpy(float)[ok]
        hi = results[f"{c}_hi90"].to_numpy(float)[ok]
        sd = results[f"{c}_sd"].to_numpy(float)[ok]
        rmse = float(np.sqrt(np.mean((est - tru) ** 2)))
        rms_sd = float(np.sqrt(np.mean(sd**2)))
        rows.append({"column": c, "years": int(ok.sum()),
                     "coverage90": float(np.mean((lo <= tru) & (tru <= hi))),
                     "rmse_over_sd": rmse / rms_sd if rms_sd > 0 else float("inf")})
    return pd.DataFrame(rows)


def run_scenario(domain: Domain, grid: Grid, scenario: Scenario, years: int, options,
                 seed: int) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Draw ``years`` independent years and run the tool's own index computation on them.

    Parameters
    ----------
    domain, grid
        The survey domain and its grid.
    scenario
        Field model and design.
    years
        Number of synthetic years.
    options
        :class:`coldindex.config.IndexOptions` for the tool (its fit, draws, sims).
    seed
        Seed of the synthetic draws (the tool's own seed is in ``options``).

    Returns
    -------
    tuple
        The tool's indices (one row a year) and the truths (same order).
    """
    from coldindex.indices import compute_indices

    rng = np.random.default_rng(seed)
    frames, truths = [], []
    area = grid.active_area()
    for k in range(years):
        casts, truth = draw_year(domain, grid, scenario, rng)
        frames.append(casts.assign(year=2000 + k))
        truths.append({"year": 2000 + k, **true_indices(truth, area, options.thresholds)})
    casts = pd.concat(frames, ignore_index=True)
    casts.insert(0, "row", np.arange(2, len(casts) + 2))  # as a spreadsheet numbers them
    bathy = bathymetry_grid(domain) if scenario.depth_slope else None
    res = compute_indices(casts, domain, grid, options, bathy)
    return res.table, pd.DataFrame(truths)
