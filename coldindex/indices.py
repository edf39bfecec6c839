"""Cold-water areas, area-weighted mean bottom temperature and their uncertainty.

The headline area below a threshold T is the *expected* area under the kriging
model, ``sum(cell_area * P(T_cell < T))`` with P Gaussian from the kriging mean
and standard deviation. The area of the kriged map below T, which kriging's
smoothing biases low in the tails, is kept as ``_map``. Conditional simulations
give ``_sd``, ``_lo90`` and ``_hi90`` of every area and of the mean.

A year with too few casts or too little coverage gets no indices and the reason
in ``note``: never a silent extrapolation.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray
from scipy.spatial import cKDTree
from scipy.special import ndtr

from coldindex.config import IndexOptions
from coldindex.domain import Domain, Grid, sample_lonlat_grid, station_spacing_km
from coldindex.errors import InputError, TooFewDataError
from coldindex.interpolate import (
    FAMILIES,
    Kriging,
    Variogram,
    conditional_simulations,
    fit_variogram,
    idw_loo,
    idw_predict,
)
from coldindex.schema import area_column, indices_table

FloatArray = NDArray[np.float64]
COVERAGE_SPACINGS = 1.5


def area_below(values: ArrayLike, sd: ArrayLike | None, cell_area: ArrayLike,
               threshold: float) -> float:
    """Expected area below a threshold: ``sum(a * Phi((T - m) / s))``.

    Parameters
    ----------
    values
        Mean bottom temperature per cell (kriging estimate or model field). [°C]
    sd
        Standard deviation per cell [°C]; None or 0 counts the cell when ``m < T``.
    cell_area
        Cell areas. [km²]
    threshold
        Threshold T. [°C]

    Returns
    -------
    float
        Area. [km²]
    """
    m = np.asarray(values, float)
    a = np.asarray(cell_area, float)
    if sd is None:
        p = (m < threshold).astype(float)
    else:
        s = np.asarray(sd, float)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            p = np.where(s > 0, ndtr((threshold - m) / np.where(s > 0, s, 1.0)),
                         (m < threshold).astype(float))
    return float(np.sum(a * p))


def area_weighted_mean(values: ArrayLike, cell_area: ArrayLike) -> float:
    """Area-weighted mean of a field over the cells. [same unit as values]"""
    a = np.asarray(cell_area, float)
    return float(np.sum(a * np.asarray(values, float)) / np.sum(a))


def coverage_share(cast_xy: ArrayLike, cell_xy: ArrayLike, cell_area: ArrayLike,
                   spacing_km: float) -> float:
    """Share of the domain area within 1.5 station spacings of a cast.

    Parameters
    ----------
    cast_xy
        Cast positions, (n, 2). [km]
    cell_xy
        Cell centres, (m, 2). [km]
    cell_area
        Cell areas. [km²]
    spacing_km
        Station spacing: median nearest-neighbour distance between the casts. [km]

    Returns
    -------
    float
        Share of the domain area, 0..1.
    """
    if not np.isfinite(spacing_km):
        return 0.0
    dist, _ = cKDTree(np.asarray(cast_xy, float)).query(np.asarray(cell_xy, float), k=1)
    a = np.asarray(cell_area, float)
    return float(a[dist <= COVERAGE_SPACINGS * spacing_km].sum() / a.sum())


def interval_summary(samples: ArrayLike) -> tuple[float, float, float]:
    """Standard deviation and 5th/95th percentiles of a sample (a 90 % interval)."""
    s = np.asarray(samples, float)
    lo, hi = np.percentile(s, [5.0, 95.0])
    return float(np.std(s, ddof=1)), float(lo), float(hi)


@dataclass
class IndexResult:
    """Everything the index computation produced.

    Attributes
    ----------
    table
        ``indices.csv`` as a frame (columns per :func:`coldindex.schema.indices_table`).
    years
        Survey years, in the order of the field arrays.
    estimate, sd
        Mapped bottom temperature and its standard deviation per year at the
        active cells, (n_years, m); NaN for years without indices. [°C]
    casts
        The casts used, with projected ``x_km``, ``y_km``.
    family
        Variogram family used (or ``per-year``/``idw``).
    family_scores
        Pooled leave-one-out RMSE by family when the family was chosen. [°C]
    clipped_share
        Largest share of embedding eigenvalue mass clipped in any year.
    """

    table: pd.DataFrame
    years: list[int]
    estimate: FloatArray
    sd: FloatArray
    casts: pd.DataFrame
    family: str
    family_scores: dict[str, float] = field(default_factory=dict)
    clipped_share: float = 0.0


def _year_casts(casts: pd.DataFrame) -> dict[int, pd.DataFrame]:
    return {int(y): g for y, g in casts.groupby("year", sort=True)}


def _cv_fit(xy: FloatArray, z: FloatArray, family: str, drift: FloatArray | None
            ) -> tuple[float, Variogram | None]:
    try:
        vg = fit_variogram(xy, z, family, drift)
        err, _ = Kriging(xy, z, vg, drift).loo()
    except (TooFewDataError, np.linalg.LinAlgError):
        return float("inf"), None
    return float(np.mean(err**2)), vg


def choose_family(samples: Sequence[tuple[FloatArray, FloatArray, FloatArray | None]]
                  ) -> tuple[str, dict[str, float], list[Variogram | None]]:
    """Choose the variogram family with the lowest pooled leave-one-out RMSE.

    Parameters
    ----------
    samples
        One ``(xy, values, drift)`` triple per usable year.

    Returns
    -------
    tuple
        The family, the pooled RMSE of every family [°C], and the chosen family's
        fitted variogram for each sample (reused, not refitted, by the caller).
    """
    scores: dict[str, float] = {}
    fits: dict[str, list[Variogram | None]] = {}
    for fam in FAMILIES:
        results = [_cv_fit(xy, z, fam, d) for xy, z, d in samples]
        mse = [r[0] for r in results]
        fits[fam] = [r[1] for r in results]
        scores[fam] = float(np.sqrt(np.mean(mse))) if mse else float("inf")
    best = min(FAMILIES, key=lambda f: (scores[f], FAMILIES.index(f)))
    return best, scores, fits[best]


def compute_indices(casts: pd.DataFrame, domain: Domain, grid: Grid, options: IndexOptions,
                    bathymetry: tuple[FloatArray, FloatArray, FloatArray] | None = None,
                    frozen_family: str | None = None,
                    progress: Callable[[int], None] | None = None) -> IndexResult:
    """Compute the yearly indices from quality-controlled casts.

    Parameters
    ----------
    casts
        Casts used (``year``, ``lat``, ``lon``, ``bottom_c``, ``doy``), e.g.
        :attr:`coldindex.qc.QCResult.casts`.
    domain
        Survey domain and projection.
    grid
        Equal-area grid over the domain.
    options
        Index settings.
    bathymetry
        Optional ``(lon_axis, lat_axis, depth)`` used as external drift.
    frozen_family
        A variogram family frozen by an earlier run; used when ``options.variogram``
        is ``auto``.
    progress
        Called with each year when it is done.

    Returns
    -------
    IndexResult
        The table, the fields and the choices made.
    """
    casts = casts.copy()
    x, y = domain.to_xy(casts["lon"].to_numpy(float), casts["lat"].to_numpy(float))
    casts["x_km"], casts["y_km"] = x, y
    cell_xy = grid.active_xy()
    cell_area = grid.active_area()
    drift_cells: FloatArray | None = None
    if bathymetry is not None and options.method == "kriging":
        drift_cells = sample_lonlat_grid(*bathymetry, grid.lon[grid.mask], grid.lat[grid.mask])
        casts["drift"] = sample_lonlat_grid(*bathymetry, casts["lon"], casts["lat"])
        if np.isnan(drift_cells).any() or casts["drift"].isna().any():
            raise InputError("The bathymetry grid does not cover the whole domain and every "
                             "cast; give a bathymetry that does, or leave it out.")
    by_year = _year_casts(casts)
    years = sorted(by_year)

    def arrays(g: pd.DataFrame) -> tuple[FloatArray, FloatArray, FloatArray | None]:
        d = g["drift"].to_numpy(float) if "drift" in g.columns else None
        return g[["x_km", "y_km"]].to_numpy(float), g["bottom_c"].to_numpy(float), d

    # Screen years first: casts and coverage decide which years get indices.
    screen: dict[int, tuple[float, str]] = {}
    for yr in years:
        g = by_year[yr]
        xy, _, _ = arrays(g)
        spacing = station_spacing_km(xy[:, 0], xy[:, 1])
        cov = coverage_share(xy, cell_xy, cell_area, spacing) if len(g) >= 2 else 0.0
        note = ""
        if len(g) < options.min_casts:
            note = (f"no indices: {len(g)} casts, fewer than the minimum {options.min_casts} "
                    "(--min-casts)")
        elif cov < options.min_coverage:
            note = (f"no indices: coverage {cov:.2f} below the minimum {options.min_coverage} "
                    "(--min-coverage)")
        screen[yr] = (cov, note)
    usable = [yr for yr in years if not screen[yr][1]]

    family = options.variogram
    scores: dict[str, float] = {}
    fitted: dict[int, Variogram] = {}
    if options.method == "idw":
        family = "idw"
    elif options.per_year_family:
        family = "per-year"
    elif family == "auto":
        if frozen_family is not None:
            family = frozen_family
        elif usable:
            family, scores, fits = choose_family([arrays(by_year[yr]) for yr in usable])
            fitted = {yr: vg for yr, vg in zip(usable, fits, strict=True) if vg is not None}
        else:
            family = FAMILIES[0]

    table = indices_table(options.thresholds, with_sims=options.sims > 0 and
                          options.method == "kriging")
    rows = []
    m = len(cell_area)
    est_all = np.full((len(years), m), np.nan)
    sd_all = np.full((len(years), m), np.nan)
    clipped = 0.0
    for k, yr in enumerate(years):
        g = by_year[yr]
        xy, z, drift = arrays(g)
        cov, note = screen[yr]
        row: dict[str, object] = {"year": yr, "n_casts": len(g),
                                  "median_doy": float(g["doy"].median()),
                                  "coverage": round(cov, 4), "note": note}
        if not note:
            if options.method == "idw":
                est = idw_predict(xy, z, cell_xy)
                err = idw_loo(xy, z)
                row.update(cv_rmse_c=float(np.sqrt(np.mean(err**2))),
                           cv_bias_c=float(np.mean(err)), variogram="idw(power=2,k=12)",
                           note="idw: areas are map areas; no uncertainty")
                row["bottom_mean_c"] = area_weighted_mean(est, cell_area)
                for t in options.thresholds:
                    a = area_below(est, None, cell_area, t)
                    row[area_column(t)] = a
                    row[area_column(t) + "_map"] = a
                est_all[k] = est
            else:
                fam = family
                if options.per_year_family:
                    fam, _, per_year = choose_family([(xy, z, drift)])
                    if per_year[0] is not None:
                        fitted[yr] = per_year[0]
                vg: Variogram = fitted.get(yr) or fit_variogram(xy, z, fam, drift)
                kr = Kriging(xy, z, vg, drift)
                est, var, W = kr.predict(cell_xy, drift_cells, return_weights=options.sims > 0)
                assert var is not None
                sd = np.sqrt(var)
                err, err_var = kr.loo()
                row.update(cv_rmse_c=float(np.sqrt(np.mean(err**2))),
                           cv_bias_c=float(np.mean(err)),
                           cv_msse=float(np.mean(err**2 / err_var)),
                           variogram=vg.describe())
                row["bottom_mean_c"] = area_weighted_mean(est, cell_area)
                for t in options.thresholds:
                    row[area_column(t)] = area_below(est, sd, cell_area, t)
                    row[area_column(t) + "_map"] = area_below(est, None, cell_area, t)
                if options.sims > 0:
                    rng = np.random.default_rng(np.random.SeedSequence([options.seed, yr]))
                    sims, emb = conditional_simulations(kr, grid.x, grid.y, grid.mask,
                                                        options.sims, rng, drift_cells,
                                                        weights=W)
                    clipped = max(clipped, emb.clipped_share)
                    means = sims @ cell_area / cell_area.sum()
                    for suffix, v in zip(("_sd", "_lo90", "_hi90"), interval_summary(means),
                                         strict=True):
                        row["bottom_mean_c" + suffix] = v
                    for t in options.thresholds:
                        areas = (sims < t).astype(float) @ cell_area
                        for suffix, v in zip(("_sd", "_lo90", "_hi90"),
                                             interval_summary(areas), strict=True):
                            row[area_column(t) + suffix] = v
                est_all[k] = est
                sd_all[k] = sd
        rows.append(row)
        if progress is not None:
            progress(yr)
    df = pd.DataFrame(rows).reindex(columns=table.names)
    return IndexResult(table=df, years=years, estimate=est_all, sd=sd_all, casts=casts,
                       family=family, family_scores=scores, clipped_share=clipped)
