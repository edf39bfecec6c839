"""Cold-water areas, area-weighted mean bottom temperature and their uncertainty.

The headline area below a threshold T is the *expected* area under the kriging
model, ``sum(cell_area * P(T_cell < T))`` with P Gaussian from the kriging mean
and standard deviation. The area of the kriged map below T is kept as ``_map``;
kriging's smoothing biases it low for thresholds below the field's median and
high above it. Conditional simulations, spread over draws of the variogram
parameters from their posterior, give ``_sd``, ``_lo90`` and ``_hi90`` of every
area and of the mean: interpolation uncertainty and variogram uncertainty.

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

from coldindex import dense
from coldindex.config import IndexOptions
from coldindex.domain import Domain, Grid, sample_lonlat_grid, station_spacing_km
from coldindex.errors import InputError, TooFewDataError
from coldindex.fitting import Fit
from coldindex.interpolate import (
    FAMILIES,
    Variogram,
    idw_loo,
    idw_predict,
)
from coldindex.parallel import YearPool, warm_up
from coldindex.progress import ProgressEvent, emit
from coldindex.regions import RegionWeights
from coldindex.schema import area_column, indices_table, regions_table
from coldindex.simulation import SimSummaries

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
    """Share of the domain area within 1.5 reference station spacings of a cast.

    The spacing is a fixed reference (frozen with the domain), not the year's own,
    so a denser year never scores lower than a sparser one on the same stations.

    Parameters
    ----------
    cast_xy
        Cast positions, (n, 2). [km]
    cell_xy
        Cell centres, (m, 2). [km]
    cell_area
        Cell areas. [km²]
    spacing_km
        Reference station spacing (:func:`reference_spacing`). [km]

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


def reference_spacing(spacings: ArrayLike) -> float:
    """Reference station spacing: the median of the years' station spacings. [km]

    Frozen with the domain on the first run and reused, so coverage measures the
    same thing every year (a year's own spacing shrinks as casts are added).
    """
    s = np.asarray(spacings, float)
    s = s[np.isfinite(s) & (s > 0)]
    return float(np.median(s)) if len(s) else float("nan")


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
        Pooled score by family when the family was chosen: ``-2 log L`` for likelihood
        fits, leave-one-out RMSE [°C] for ``wls``.
    reference_spacing_km
        The reference station spacing used for coverage (to be frozen). [km]
    fit_method
        Variogram fit method used.
    reference_day
        The day the maps and indices were adjusted to with the survey-day drift
        (to be frozen); None without it. [day of the survey year]
    regions
        The long table of region and depth-zone indices (``regions.csv``), or None.
    outliers
        Casts flagged as spatial outliers and kept out of the fit: ``row``, ``year``,
        ``station`` and the leave-one-out standardized residual ``z``.
    draws
        Per year, the per-realization summaries of the domain and of every region.
    """

    table: pd.DataFrame
    years: list[int]
    estimate: FloatArray
    sd: FloatArray
    casts: pd.DataFrame
    family: str
    family_scores: dict[str, float] = field(default_factory=dict)
    reference_spacing_km: float = float("nan")
    fit_method: str = "reml"
    reference_day: float | None = None
    regions: pd.DataFrame | None = None
    outliers: pd.DataFrame = field(default_factory=lambda: pd.DataFrame(
        columns=["row", "year", "station", "z"]))
    draws: dict[int, SimSummaries] = field(default_factory=dict)


def _year_casts(casts: pd.DataFrame) -> dict[int, pd.DataFrame]:
    return {int(y): g for y, g in casts.groupby("year", sort=True)}


def _family_score(xy: FloatArray, z: FloatArray, family: str, drift: FloatArray | None,
                  method: str) -> tuple[float, Fit | None]:
    """The fit and its score: ``-2 log L`` for likelihood fits, LOO mean squared error for wls."""
    try:
        fit = dense.fit_year(xy, z, family, drift, method=method)
        if method != "wls":
            return fit.neg2loglik, fit
        err, _ = dense.make_kriging(xy, z, fit.variogram, drift).loo()
    except (TooFewDataError, np.linalg.LinAlgError):
        return float("inf"), None
    return float(np.mean(err**2)), fit


def family_scores(xy: FloatArray, z: FloatArray, drift: FloatArray | None,
                  method: str = "reml") -> list[tuple[float, Fit | None]]:
    """One year's score and fit for every family of :data:`FAMILIES`, in that order.

    The score is ``-2 log L`` for likelihood fits and the leave-one-out mean squared
    error [°C²] for ``wls``; ``inf`` (and no fit) where the family cannot be fitted.
    """
    return [_family_score(xy, z, fam, drift, method) for fam in FAMILIES]


def pick_family(per_year: Sequence[Sequence[tuple[float, Fit | None]]], method: str = "reml"
                ) -> tuple[str, dict[str, float], list[Fit | None]]:
    """Pool the years' :func:`family_scores`; pick the best family (:func:`choose_family`)."""
    scores: dict[str, float] = {}
    fits: dict[str, list[Fit | None]] = {}
    for j, fam in enumerate(FAMILIES):
        vals = [r[j][0] for r in per_year]
        fits[fam] = [r[j][1] for r in per_year]
        if not vals:
            scores[fam] = float("inf")
        elif method == "wls":
            scores[fam] = float(np.sqrt(np.mean(vals)))
        else:
            scores[fam] = float(np.sum(vals))
    best = min(FAMILIES, key=lambda f: (scores[f], FAMILIES.index(f)))
    return best, scores, fits[best]


def choose_family(samples: Sequence[tuple[FloatArray, FloatArray, FloatArray | None]],
                  method: str = "reml") -> tuple[str, dict[str, float], list[Fit | None]]:
    """Choose the variogram family that fits the usable years best.

    With a likelihood fit (``reml``, ``ml``) the score is the pooled ``-2 log L``
    over the years (every family has the same three parameters, so this is also
    the pooled AIC); with ``wls`` it is the pooled leave-one-out RMSE, since
    least squares has no likelihood to compare.

    Parameters
    ----------
    samples
        One ``(xy, values, drift)`` triple per usable year.
    method
        Fit method.

    Returns
    -------
    tuple
        The family, the score of every family (``-2 log L`` summed over years, or
        RMSE [°C]), and the chosen family's fit for each sample (reused, not refitted).
    """
    return pick_family([family_scores(xy, z, d, method) for xy, z, d in samples], method)


def compute_indices(casts: pd.DataFrame, domain: Domain, grid: Grid, options: IndexOptions,
                    bathymetry: tuple[FloatArray, FloatArray, FloatArray] | None = None,
                    frozen_family: str | None = None,
                    progress: Callable[[ProgressEvent], None] | None = None,
                    frozen_spacing_km: float | None = None,
                    regions: RegionWeights | None = None,
                    frozen_reference_day: float | None = None,
                    workers: int = 1, scheduler: str | None = None) -> IndexResult:
    """Compute the yearly indices from quality-controlled casts.

    The variogram-family fits and the per-year work (:func:`index_year`) run on
    ``workers`` local processes or a dask scheduler; where they run changes no number
    (each year's simulations are seeded by ``SeedSequence([seed, year])``, and BLAS
    runs one thread a task in every mode: :mod:`coldindex.parallel`).

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
        Called with a :class:`coldindex.progress.ProgressEvent` as each stage opens
        (``family`` when the family is chosen, then ``years``) and as each of its
        years finishes; in this process, in finishing order.
    frozen_spacing_km
        Reference station spacing frozen by an earlier run [km]; None computes it
        from these casts (:func:`reference_spacing`).
    regions
        Regions and depth zones as per-cell area weights
        (:mod:`coldindex.regions`); each gets every index, from the same kriging
        and the same conditional realizations as the domain.
    frozen_reference_day
        Reference survey day frozen by an earlier run (``options.timing_drift``); None
        takes ``options.reference_day`` or, when that is 0, the median survey day.
    workers
        Local worker processes for the years (1: all in this process). An execution
        setting: the results are the same for any value.
    scheduler
        Address of a dask.distributed scheduler to run the years on instead, or
        ``"local"`` for a ``LocalCluster`` of ``workers`` processes; None for local
        processes (:class:`coldindex.parallel.YearPool`).

    Returns
    -------
    IndexResult
        The table, the fields and the choices made.
    """
    warm_up(workers, scheduler)  # the worker processes' imports overlap the screening
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
    timing = options.timing_drift and options.method == "kriging"
    ref_day: float | None = None
    if timing:
        casts["day"] = survey_day(casts)
        if casts["day"].isna().any():
            raise InputError(f"index.timing_drift needs a date for every cast; "
                             f"{int(casts['day'].isna().sum())} casts have none (e.g. row "
                             f"{casts.loc[casts['day'].isna(), 'row'].iloc[0]}): add the "
                             "dates or turn the survey-day drift off.")
        ref_day = (float(frozen_reference_day) if frozen_reference_day is not None
                   else float(options.reference_day) if options.reference_day != 0
                   else float(np.median(casts["day"])))
        day_cells = np.full(len(cell_area), ref_day)
        drift_cells = (day_cells if drift_cells is None
                       else np.column_stack([drift_cells, day_cells]))
    drift_cols = tuple(c for c in ("drift", "day") if c in casts.columns)
    by_year = _year_casts(casts)
    years = sorted(by_year)

    # Screen years first: casts and coverage decide which years get indices.
    spacings = {yr: station_spacing_km(*_arrays(by_year[yr], drift_cols)[0].T) for yr in years}
    ref = (float(frozen_spacing_km) if frozen_spacing_km is not None
           else reference_spacing(list(spacings.values())))
    screen: dict[int, tuple[float, str]] = {}
    for yr in years:
        g = by_year[yr]
        xy, _, _ = _arrays(g, drift_cols)
        cov = coverage_share(xy, cell_xy, cell_area, ref) if len(g) >= 2 else 0.0
        note = ""
        if len(g) < options.min_casts:
            note = (f"no indices: {len(g)} casts, fewer than the minimum {options.min_casts} "
                    "(--min-casts)")
        elif cov < options.min_coverage:
            note = (f"no indices: coverage {cov:.2f} below the minimum {options.min_coverage} "
                    "(--min-coverage)")
        screen[yr] = (cov, note)
    usable = [yr for yr in years if not screen[yr][1]]

    with_sims = options.sims > 0 and options.method == "kriging"
    surface = _surface_years(casts, options.min_casts) if options.method == "kriging" else set()
    shared = YearShared(grid=grid, cell_xy=cell_xy, cell_area=cell_area,
                        drift_cells=drift_cells, options=options,
                        drift_cols=drift_cols, timing=timing, ref_day=ref_day,
                        regions=regions, with_sims=with_sims)
    family = options.variogram
    scores: dict[str, float] = {}
    fitted: dict[int, Fit] = {}
    with YearPool(shared, workers=min(workers, max(len(usable), 1)),
                  scheduler=scheduler) as pool:
        if options.method == "idw":
            family = "idw"
        elif options.per_year_family:
            family = "per-year"
        elif family == "auto":
            if frozen_family is not None:
                family = frozen_family
            elif usable:
                emit(progress, "family", 0, len(usable))
                done = [0]

                def family_done(i: int, _: object) -> None:
                    done[0] += 1
                    emit(progress, "family", done[0], len(usable), usable[i])

                per_year = pool.map(_family_task,
                                    [_arrays(by_year[yr], drift_cols) for yr in usable],
                                    family_done)
                family, scores, fits = pick_family(per_year, options.fit)
                fitted = {yr: f for yr, f in zip(usable, fits, strict=True) if f is not None}
            else:
                family = FAMILIES[0]
        tasks = [YearTask(year=yr, casts=by_year[yr], coverage=screen[yr][0],
                          note=screen[yr][1], family=family, fit=fitted.get(yr),
                          surface=yr in surface)
                 for yr in years]
        emit(progress, "years", 0, len(years))
        finished = [0]
        by_result: dict[int, YearResult] = {}

        def year_done(r: YearResult) -> None:
            by_result[r.year] = r
            finished[0] += 1
            emit(progress, "years", finished[0], len(years), r.year)

        # Years without indices cost nothing: they stay here rather than travel.
        for t in tasks:
            if t.note:
                year_done(index_year(shared, t))
        pool.map(index_year, [t for t in tasks if not t.note], lambda _, r: year_done(r))

    table = indices_table(options.thresholds, with_sims=with_sims, with_timing=timing,
                          with_surface=bool(surface))
    rows = []
    region_rows: list[dict[str, object]] = []
    outliers: list[pd.DataFrame] = []
    draws: dict[int, SimSummaries] = {}
    m = len(cell_area)
    est_all = np.full((len(years), m), np.nan)
    sd_all = np.full((len(years), m), np.nan)
    for k, yr in enumerate(years):
        r = by_result[yr]
        rows.append(r.row)
        region_rows += r.region_rows
        if r.outliers is not None:
            outliers.append(r.outliers)
        if r.sims is not None:
            draws[yr] = r.sims
        if r.est is not None:
            est_all[k] = r.est
        if r.sd is not None:
            sd_all[k] = r.sd
    df = pd.DataFrame(rows).reindex(columns=table.names)
    reg_df = None
    if regions is not None:
        reg_table = regions_table(options.thresholds, with_sims=with_sims)
        reg_df = pd.DataFrame(region_rows).reindex(columns=reg_table.names)
        for yr in years:  # years without indices still get one blank row per region
            if yr not in set(reg_df["year"]):
                blank = pd.DataFrame({"year": yr, "region": list(regions.names),
                                      "region_km2": regions.weights.sum(axis=1),
                                      "note": screen[yr][1]})
                reg_df = pd.concat([reg_df, blank.reindex(columns=reg_table.names)])
        order = {n: i for i, n in enumerate(regions.names)}
        reg_df = (reg_df.assign(_o=reg_df["region"].map(order))
                  .sort_values(["year", "_o"], kind="stable").drop(columns="_o")
                  .reset_index(drop=True))
    out_df = (pd.concat(outliers, ignore_index=True) if outliers
              else pd.DataFrame(columns=["row", "year", "station", "z"]))
    if len(out_df):
        casts = casts[~casts["row"].isin(out_df["row"])].reset_index(drop=True)
    return IndexResult(table=df, years=years, estimate=est_all, sd=sd_all, casts=casts,
                       family=family, family_scores=scores,
                       reference_spacing_km=ref, fit_method=options.fit,
                       reference_day=ref_day, regions=reg_df,
                       outliers=out_df, draws=draws)


@dataclass(frozen=True)
class YearShared:
    """What every year's work shares: grid, cells, options and the run's choices.

    Sent once to each worker (:class:`coldindex.parallel.YearPool`), not with every year.

    Attributes
    ----------
    grid
        The equal-area grid (the simulations need its lattice).
    cell_xy, cell_area
        Active cell centres, (m, 2) [km], and areas, (m,) [km²].
    drift_cells
        External drift at the cells (depth, and/or the reference day), or None.
    options
        Index settings.
    drift_cols
        The casts' drift columns, in the order of ``drift_cells``' columns.
    timing
        Whether the survey day is a drift.
    ref_day
        The reference survey day with ``timing``. [day of the survey year]
    regions
        Regions and depth zones, or None.
    with_sims
        Whether conditional simulations run.
    """

    grid: Grid
    cell_xy: FloatArray
    cell_area: FloatArray
    drift_cells: FloatArray | None
    options: IndexOptions
    drift_cols: tuple[str, ...]
    timing: bool
    ref_day: float | None
    regions: RegionWeights | None
    with_sims: bool


@dataclass(frozen=True)
class YearTask:
    """One survey year's own inputs.

    Attributes
    ----------
    year
        Survey year; with ``options.seed`` it seeds the year's simulations.
    casts
        The year's casts, with ``x_km``, ``y_km`` and any drift columns.
    coverage
        Coverage share of the year, 0..1.
    note
        Why the year gets no indices; empty when it does.
    family
        The variogram family (``per-year``: chosen for the year; ``idw``: none).
    fit
        The family choice's fit of this year, reused rather than refitted; or None.
    surface
        Whether the year has enough surface temperatures for surface indices.
    """

    year: int
    casts: pd.DataFrame
    coverage: float
    note: str
    family: str = FAMILIES[0]
    fit: Fit | None = None
    surface: bool = False


@dataclass
class YearResult:
    """One survey year's results.

    Attributes
    ----------
    year
        Survey year.
    row
        The year's ``indices.csv`` row.
    est, sd
        Mapped bottom temperature and its standard deviation at the active cells
        (None where not mapped; ``sd`` None for IDW). [°C]
    region_rows
        The year's ``regions.csv`` rows.
    outliers
        Casts flagged as spatial outliers (``row``, ``year``, ``station``, ``z``), or None.
    sims
        The per-realization summaries, or None without simulations.
    """

    year: int
    row: dict[str, object]
    est: FloatArray | None = None
    sd: FloatArray | None = None
    region_rows: list[dict[str, object]] = field(default_factory=list)
    outliers: pd.DataFrame | None = None
    sims: SimSummaries | None = None


def _arrays(g: pd.DataFrame, drift_cols: Sequence[str]
            ) -> tuple[FloatArray, FloatArray, FloatArray | None]:
    """Positions [km], bottom temperatures [°C] and drift columns of some casts."""
    d = g[list(drift_cols)].to_numpy(float) if drift_cols else None
    return g[["x_km", "y_km"]].to_numpy(float), g["bottom_c"].to_numpy(float), d


def _family_task(shared: YearShared,
                 sample: tuple[FloatArray, FloatArray, FloatArray | None]
                 ) -> list[tuple[float, Fit | None]]:
    """:func:`family_scores` of one year, as a task of :class:`coldindex.parallel.YearPool`."""
    return family_scores(*sample, method=shared.options.fit)


def index_year(shared: YearShared, task: YearTask) -> YearResult:
    """Everything one survey year gets: fit, outlier refit, kriging, LOO, areas, simulations.

    A module-level function of plain inputs, so it runs the same in this process, in a
    worker process or on a dask worker; the simulations draw from
    ``SeedSequence([options.seed, year])``, so the result does not depend on where or
    in which order the years run.

    Parameters
    ----------
    shared
        Grid, cells, options and the run's choices.
    task
        The year's casts, screening and any reusable fit.

    Returns
    -------
    YearResult
        The year's row, maps, region rows, outliers and simulation summaries.
    """
    options, yr, g = shared.options, task.year, task.casts
    cell_xy, cell_area, drift_cells = shared.cell_xy, shared.cell_area, shared.drift_cells
    regions = shared.regions
    xy, z, drift = _arrays(g, shared.drift_cols)
    row: dict[str, object] = {"year": yr, "n_casts": len(g),
                              "median_doy": float(g["doy"].median()),
                              "coverage": round(task.coverage, 4), "note": task.note}
    if task.note:
        return YearResult(year=yr, row=row)
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
        region_rows = ([] if regions is None else
                       _region_rows(yr, regions, est, None, options.thresholds, None,
                                    "idw: areas are map areas"))
        return YearResult(year=yr, row=row, est=est, region_rows=region_rows)
    fam = task.family
    fit0 = task.fit
    if options.per_year_family:
        fam, _, per_year = choose_family([(xy, z, drift)], options.fit)
        if per_year[0] is not None:
            fit0 = per_year[0]
    fixed = (Variogram(options.variogram, *options.variogram_params)
             if options.variogram_params else None)
    fit = fit0 or dense.fit_year(xy, z, fam, drift, method=options.fit, fixed=fixed)
    kr = dense.make_kriging(xy, z, fit.variogram, drift)
    flagged = spatial_outliers(kr, options.outlier_z)
    outliers = None
    if flagged.any():
        # Fit, flag, refit: an outlier inflates the fit that judges it.
        outliers = g.loc[flagged, ["row", "year", "station"]].copy()
        outliers["z"] = standardized_loo(kr)[flagged]
        g = g.loc[~flagged]
        xy, z, drift = _arrays(g, shared.drift_cols)
        row["n_casts"] = len(g)
        row["median_doy"] = float(g["doy"].median())
        fit = dense.fit_year(xy, z, fit.variogram.family, drift, method=options.fit,
                             fixed=fixed)
        kr = dense.make_kriging(xy, z, fit.variogram, drift)
    vg: Variogram = fit.variogram
    est, var, _ = kr.predict(cell_xy, drift_cells)
    assert var is not None
    sd = np.sqrt(var)
    err, err_var = kr.loo()
    notes = [f"variogram {n}" for n in fit.at_bound]
    if flagged.any():
        notes.append(f"{int(flagged.sum())} spatial outlier"
                     f"{'s' if flagged.sum() > 1 else ''} kept out of the fit "
                     f"(|z| > {options.outlier_z:g})")
    row.update(cv_rmse_c=float(np.sqrt(np.mean(err**2))),
               cv_bias_c=float(np.mean(err)),
               cv_msse=float(np.mean(err**2 / err_var)),
               variogram=vg.describe())
    if shared.timing and shared.ref_day is not None:
        rate = float(kr.beta[-1])  # the survey-day column is the last drift
        row["timing_rate_c_per_day"] = rate
        row["timing_adjustment_c"] = rate * (shared.ref_day - float(g["day"].median()))
    row["bottom_mean_c"] = area_weighted_mean(est, cell_area)
    for t in options.thresholds:
        row[area_column(t)] = area_below(est, sd, cell_area, t)
        row[area_column(t) + "_map"] = area_below(est, None, cell_area, t)
    sims: SimSummaries | None = None
    if shared.with_sims:
        rng = np.random.default_rng(np.random.SeedSequence([options.seed, yr]))
        sims = dense.simulate(kr, fit, xy, z, drift, shared.grid, cell_xy, cell_area,
                                  drift_cells, options, rng,
                                  regions.weights if regions is not None else None)
        row["simulation"] = sims.method
        if sims.note:
            notes.append(sims.note)
        _put_intervals(row, sims.means, sims.areas, options.thresholds)
    if task.surface:
        notes += _surface_indices(row, g, xy, vg.family, cell_xy, cell_area, options)
    row["note"] = "; ".join(notes)
    region_rows = ([] if regions is None else
                   _region_rows(yr, regions, est, sd, options.thresholds, sims, ""))
    return YearResult(year=yr, row=row, est=est, sd=sd, region_rows=region_rows,
                      outliers=outliers, sims=sims)


def _surface_years(casts: pd.DataFrame, min_casts: int) -> set[int]:
    """Years with at least ``min_casts`` casts carrying a surface temperature."""
    if "surface_c" not in casts.columns:
        return set()
    n = casts["surface_c"].astype(float).notna().groupby(casts["year"]).sum()
    return {int(y) for y, k in n.items() if k >= min_casts}


def _surface_indices(row: dict[str, object], g: pd.DataFrame, xy: FloatArray, family: str,
                     cell_xy: FloatArray, cell_area: FloatArray, options: IndexOptions
                     ) -> list[str]:
    """Sea-surface mean and expected areas below/above the thresholds, into ``row``.

    The surface field gets its own variogram fit (same family as the bottom's, no
    drift: depth does not drive the surface) and ordinary kriging; the areas are
    expected areas like the bottom's. Returns notes (a failed fit leaves blanks).
    """
    s = g["surface_c"].astype(float).to_numpy()
    ok = np.isfinite(s)
    try:
        fit = dense.fit_year(xy[ok], s[ok], family, None, method=options.fit)
        est, var, _ = dense.make_kriging(xy[ok], s[ok], fit.variogram).predict(cell_xy)
    except (TooFewDataError, np.linalg.LinAlgError):
        return ["no surface indices: the surface variogram could not be fitted"]
    assert var is not None
    sd = np.sqrt(var)
    total = float(np.sum(cell_area))
    row["surface_mean_c"] = area_weighted_mean(est, cell_area)
    for t in options.thresholds:
        lab = area_column(t).removeprefix("below_")
        below = area_below(est, sd, cell_area, t)
        row[f"surface_below_{lab}"] = below
        row[f"surface_above_{lab}"] = total - below
    return []


def survey_day(casts: pd.DataFrame) -> pd.Series:
    """Day of the survey year of each cast: days from 1 January of its labelled year, plus 1.

    Equal to the day of year for a date inside the labelled year; a December cast of a
    survey labelled with the next year gets 0 or less, so a survey that crosses the new
    year stays in order. Casts without a readable date get NaN (the day of year, when
    only that is known). [day]
    """
    if "date" in casts.columns:
        when = pd.to_datetime(casts["date"].where(casts["date"].astype(str).str.strip() != ""),
                              errors="coerce", format="mixed")
        start = pd.to_datetime(casts["year"].astype(int).astype(str) + "-01-01")
        day = (when - start).dt.days.astype(float) + 1.0
        if "doy" in casts.columns:
            day = day.fillna(casts["doy"].astype(float))
        return day
    return casts["doy"].astype(float) if "doy" in casts.columns else pd.Series(
        np.nan, index=casts.index)


def find_spatial_outliers(casts: pd.DataFrame, z_max: float, min_casts: int,
                          family: str = "exponential", method: str = "reml") -> pd.DataFrame:
    """Spatial outliers of every year with enough casts, from one variogram fit a year.

    Positions are projected to an Albers equal-area plane fitted to the casts, so no
    domain is needed (``coldindex check``). Years that cannot be fitted are skipped.

    Parameters
    ----------
    casts
        Quality-controlled casts (``row``, ``year``, ``station``, ``lat``, ``lon``,
        ``bottom_c``).
    z_max
        Threshold on the size of the leave-one-out standardized residual.
    min_casts
        Fewest casts for a year to be checked.
    family, method
        Variogram family and fit method.

    Returns
    -------
    pandas.DataFrame
        ``row``, ``year``, ``station``, ``z`` of the flagged casts.
    """
    import pyproj

    from coldindex.domain import albers_for, central_lon, unwrap_lon

    cols = ["row", "year", "station", "z"]
    if casts.empty or not z_max > 0:
        return pd.DataFrame(columns=cols)
    lon0 = central_lon(casts["lon"].to_numpy(float))
    lat = casts["lat"].to_numpy(float)
    crs = albers_for(lon0, float(lat.min()), float(lat.max()))
    fwd = pyproj.Transformer.from_crs(crs.geodetic_crs, crs, always_xy=True)
    x, y = fwd.transform(unwrap_lon(casts["lon"].to_numpy(float), lon0), lat)
    xy_all = np.column_stack([np.asarray(x) / 1000.0, np.asarray(y) / 1000.0])
    found = []
    for _, g in casts.groupby("year", sort=True):
        if len(g) < min_casts:
            continue
        idx = g.index.to_numpy()
        xy, z = xy_all[casts.index.get_indexer(idx)], g["bottom_c"].to_numpy(float)
        try:
            kr = dense.make_kriging(xy, z, dense.fit_year(xy, z, family, method=method).variogram)
            zs = standardized_loo(kr)
        except (TooFewDataError, np.linalg.LinAlgError):
            continue
        bad = np.abs(zs) > z_max
        if bad.any():
            found.append(g.loc[bad, ["row", "year", "station"]].assign(z=zs[bad]))
    return pd.concat(found, ignore_index=True) if found else pd.DataFrame(columns=cols)


def standardized_loo(kr: dense.AnyKriging) -> FloatArray:
    """Leave-one-out standardized residuals of the casts. [1]

    The error of predicting each cast from all the others, divided by the
    standard deviation of a new noisy observation there (smooth part plus
    nugget), so a cast consistent with the fitted field has ``z ~ N(0, 1)``.

    References
    ----------
    Dubrule, O. (1983). Cross validation of kriging in a unique neighborhood.
    Mathematical Geology 15, 687-699, eqs. 10-11.
    """
    err, var = kr.loo()
    return np.asarray(err / np.sqrt(var), float)


def spatial_outliers(kr: dense.AnyKriging, z_max: float) -> NDArray[np.bool_]:
    """Casts whose leave-one-out standardized residual exceeds ``z_max`` in size.

    Parameters
    ----------
    kr
        The year's kriging with its fitted variogram.
    z_max
        Threshold on ``|z|``; 0 turns the check off.

    Returns
    -------
    numpy.ndarray
        Boolean mask over the casts.
    """
    if not z_max > 0:
        return np.zeros(len(kr.z), dtype=bool)
    return np.abs(standardized_loo(kr)) > z_max


def _put_intervals(row: dict[str, object], means: FloatArray, areas: FloatArray,
                   thresholds: Sequence[float]) -> None:
    for suffix, v in zip(("_sd", "_lo90", "_hi90"), interval_summary(means), strict=True):
        row["bottom_mean_c" + suffix] = v
    for j, t in enumerate(thresholds):
        for suffix, v in zip(("_sd", "_lo90", "_hi90"), interval_summary(areas[:, j]),
                             strict=True):
            row[area_column(t) + suffix] = v


def _region_rows(yr: int, regions: RegionWeights, est: FloatArray, sd: FloatArray | None,
                 thresholds: Sequence[float], sims: SimSummaries | None, note: str
                 ) -> list[dict[str, object]]:
    """One ``regions.csv`` row per region for a year with indices."""
    out: list[dict[str, object]] = []
    for r, name in enumerate(regions.names):
        w = regions.weights[r]
        tot = float(w.sum())
        row: dict[str, object] = {"year": yr, "region": name, "region_km2": tot}
        if tot <= 0:
            row["note"] = f"{name} holds no part of the domain"
            out.append(row)
            continue
        row["bottom_mean_c"] = float(np.sum(w * est) / tot)
        for t in thresholds:
            row[area_column(t) + "_map"] = area_below(est, None, w, t)
            row[area_column(t)] = row[area_column(t) + "_map"] if sd is None else area_below(
                est, sd, w, t)
        if sims is not None:
            _put_intervals(row, sims.region_means[:, r], sims.region_areas[:, r, :], thresholds)
        row["note"] = note
        out.append(row)
    return out
