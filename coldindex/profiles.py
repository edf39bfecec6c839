"""Profiles to bottom values: one bottom temperature per cast, with its provenance.

A profile (a CTD cast or a logger on the trawl) holds many samples between the
surface and the sea floor. This module takes the samples of many casts as one
long frame and returns the casts table the rest of the tool reads: per cast the
deepest good sample (or the mean over the lowest metres), accepted only when it
lies close enough to the sea floor, and the sample that made the value.

Per-sample quality control, in this order (the first reason found is kept):

* ``missing`` – no temperature or no vertical position;
* ``implausible`` – temperature, salinity or depth outside the plausible range
  (the global range test of the Argo real-time checks);
* ``non_monotonic`` – pressure (depth) not above every earlier sample of the cast
  (the Argo pressure-increasing test; an upcast listed bottom first is reversed);
* ``spike`` – the Argo/GTSPP spike test on temperature.

Per cast: ``no_good_sample``, ``floor_unknown`` (neither a recorded bottom depth
nor a bathymetry value), ``not_near_bottom`` (the deepest good sample lies more
than the allowed distance above the sea floor; the detail gives the gap) and
``below_freezing`` (the bottom value is below the TEOS-10 freezing point at the
bottom sample's pressure and salinity by more than the sensor tolerance).

Pure computation: frames in, frames out; no files, no printing.
"""

from __future__ import annotations

from dataclasses import dataclass

import gsw
import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray

from coldindex.config import ProfileOptions
from coldindex.qc import QCResult, freezing_point_c

# One standard atmosphere, 101325 Pa. Source: IOC, SCOR and IAPSO 2010, TEOS-10 manual, P0
ATMOSPHERE_DBAR = 10.1325


def depth_from_pressure(pressure_dbar: ArrayLike, lat: ArrayLike,
                        includes_atmosphere: bool = False) -> NDArray[np.float64]:
    """Depth below the sea surface from pressure, TEOS-10. [m]

    Parameters
    ----------
    pressure_dbar
        Pressure. [dbar]
    lat
        Latitude (gravity varies with it). [degrees_north]
    includes_atmosphere
        True for CF ``sea_water_pressure`` (absolute pressure, atmosphere included):
        one standard atmosphere (10.1325 dbar) is subtracted to get the sea
        pressure TEOS-10 takes. False for ``sea_water_pressure_due_to_sea_water``
        and for the sea pressure CTDs report.

    Returns
    -------
    numpy.ndarray
        Depth, positive down. [m]

    References
    ----------
    IOC, SCOR and IAPSO (2010). The international thermodynamic equation of
    seawater - 2010. Manual and Guides 56, UNESCO; ``gsw_z_from_p`` (the
    75-term specific volume with the Saunders-Fofonoff gravity), McDougall and
    Barker (2011), Getting started with TEOS-10 and the GSW Oceanographic Toolbox.
    """
    p = np.asarray(pressure_dbar, dtype=float)
    if includes_atmosphere:
        p = p - ATMOSPHERE_DBAR
    return -np.asarray(gsw.z_from_p(p, np.asarray(lat, dtype=float)), dtype=float)


def pressure_from_depth(depth_m: ArrayLike, lat: ArrayLike) -> NDArray[np.float64]:
    """Sea pressure at a depth, TEOS-10 (``gsw.p_from_z``). [dbar]"""
    return np.asarray(gsw.p_from_z(-np.asarray(depth_m, dtype=float),
                                   np.asarray(lat, dtype=float)), dtype=float)


def spike_test(values: ArrayLike, pressure_dbar: ArrayLike, threshold: float,
               deep_threshold: float) -> NDArray[np.bool_]:
    """The Argo/GTSPP spike test on one profile: which samples are spikes.

    For each interior sample V2 between its neighbours V1 and V3 the test value
    is ``|V2 - (V3 + V1)/2| - |(V3 - V1)/2|``; the sample is a spike when it
    exceeds the threshold (``threshold`` above 500 dbar, ``deep_threshold`` at
    500 dbar and deeper). The end samples are never tested.

    Parameters
    ----------
    values
        The profile's values in order along the profile.
    pressure_dbar
        Their sea pressures. [dbar]
    threshold, deep_threshold
        Thresholds, in the values' unit.

    Returns
    -------
    numpy.ndarray
        True for a spike.

    References
    ----------
    Wong, A., Keeley, R., Carval, T. and the Argo Data Management Team (2020).
    Argo Quality Control Manual for CTD and Trajectory Data, version 3.3,
    doi:10.13155/33951, section 2.1.2, test 9 (spike test); the test comes from
    the GTSPP real-time quality-control manual (UNESCO-IOC 2010, Manuals and
    Guides 22).
    """
    v = np.asarray(values, dtype=float)
    p = np.asarray(pressure_dbar, dtype=float)
    out = np.zeros(v.shape, dtype=bool)
    if v.size < 3:
        return out
    v1, v2, v3 = v[:-2], v[1:-1], v[2:]
    test = np.abs(v2 - (v3 + v1) / 2.0) - np.abs((v3 - v1) / 2.0)
    limit = np.where(p[1:-1] < 500.0, threshold, deep_threshold)
    with np.errstate(invalid="ignore"):
        out[1:-1] = test > limit
    return out


def _non_monotonic(depth: NDArray[np.float64]) -> NDArray[np.bool_]:
    """Samples not deeper than every earlier one (the first is never flagged)."""
    prior = np.maximum.accumulate(np.where(np.isfinite(depth), depth, -np.inf))
    out = np.zeros(depth.shape, dtype=bool)
    out[1:] = depth[1:] <= prior[:-1]
    return out


def quality_control_samples(samples: pd.DataFrame, lat: pd.Series,
                            options: ProfileOptions) -> pd.DataFrame:
    """Flag every sample of every cast.

    Parameters
    ----------
    samples
        ``cast``, ``sample`` (order along the profile), ``temperature_c``,
        ``depth_m`` and/or ``pressure_dbar`` (sea pressure), optional ``salinity``.
    lat
        Latitude of each cast, indexed by cast id. [degrees_north]
    options
        Ranges and thresholds.

    Returns
    -------
    pandas.DataFrame
        The samples sorted by cast and order, with ``depth_m`` and ``pressure_dbar``
        both filled (TEOS-10), ``sample_flag`` and ``upcast`` (the cast was listed
        bottom first and is read in reverse).
    """
    s = samples.copy()
    for col in ("depth_m", "pressure_dbar", "salinity"):
        if col not in s.columns:
            s[col] = np.nan
    s = s.sort_values(["cast", "sample"], kind="stable").reset_index(drop=True)
    cast_lat = s["cast"].map(lat).to_numpy(float)
    depth = s["depth_m"].to_numpy(float, copy=True)
    pres = s["pressure_dbar"].to_numpy(float, copy=True)
    need_depth = ~np.isfinite(depth) & np.isfinite(pres)
    depth[need_depth] = depth_from_pressure(pres[need_depth], cast_lat[need_depth])
    need_p = ~np.isfinite(pres) & np.isfinite(depth)
    pres[need_p] = pressure_from_depth(depth[need_p], cast_lat[need_p])
    s["depth_m"], s["pressure_dbar"] = depth, pres
    temp = s["temperature_c"].to_numpy(float)
    sal = s["salinity"].to_numpy(float)

    flag = np.full(len(s), "ok", dtype=object)
    flag[~np.isfinite(temp) | ~np.isfinite(depth)] = "missing"
    with np.errstate(invalid="ignore"):
        bad = ((temp < options.min_c) | (temp > options.max_c)
               | (depth < -1.0) | (depth > options.max_depth_m)
               | (np.isfinite(sal) & ((sal < options.min_salinity)
                                      | (sal > options.max_salinity))))
    flag[(flag == "ok") & bad] = "implausible"
    upcast = np.zeros(len(s), dtype=bool)
    bounds = np.flatnonzero(np.r_[True, s["cast"].to_numpy()[1:] != s["cast"].to_numpy()[:-1],
                                  True])
    for a, b in zip(bounds[:-1], bounds[1:], strict=True):
        idx = np.arange(a, b)
        usable = idx[flag[idx] == "ok"]
        if len(usable) >= 2 and depth[usable[-1]] < depth[usable[0]]:
            idx = idx[::-1]  # an upcast listed bottom first: read it downward
            upcast[a:b] = True
        ok = idx[flag[idx] == "ok"]
        if len(ok) == 0:
            continue
        mono = _non_monotonic(depth[ok])
        flag[ok[mono]] = "non_monotonic"
        ok = ok[~mono]
        spikes = spike_test(temp[ok], pres[ok], options.spike_c, options.spike_deep_c)
        flag[ok[spikes]] = "spike"
    s["sample_flag"] = flag
    s["upcast"] = upcast
    return s


@dataclass(frozen=True)
class BottomValues:
    """Outcome of :func:`bottom_values`.

    Attributes
    ----------
    casts
        One row a cast: the casts table (strings, as :func:`coldindex.io.readers.read_casts`
        returns, ``row`` included) with provenance columns; ``bottom_c`` is blank for a
        flagged cast.
    samples
        Every sample with its ``sample_flag``, depth and pressure.
    """

    casts: pd.DataFrame
    samples: pd.DataFrame


def _fmt(v: float, digits: int) -> str:
    return "" if not np.isfinite(v) else f"{round(float(v), digits):.{digits}f}"


def bottom_values(samples: pd.DataFrame, casts: pd.DataFrame, options: ProfileOptions,
                  floor_from_bathymetry: pd.Series | None = None, *,
                  freeze_tolerance_c: float = 0.2, default_salinity: float = 34.0
                  ) -> BottomValues:
    """Bottom temperature of every cast from its profile.

    Parameters
    ----------
    samples
        Long frame of samples (see :func:`quality_control_samples`).
    casts
        One row a cast: ``cast``, ``time`` (datetime64), ``lat``, ``lon``, optional
        ``station``, ``year`` and ``bottom_depth_m`` (the recorded sea-floor depth). [m]
    options
        Conversion settings.
    floor_from_bathymetry
        Sea-floor depth at each cast from a bathymetry grid, indexed by cast id, used
        only where the cast has no recorded bottom depth (gridded depth is unreliable
        on slopes). [m]
    freeze_tolerance_c
        How far below the TEOS-10 freezing point a bottom value may lie. [°C]
    default_salinity
        Practical salinity for the freezing point where the bottom sample has none.

    Returns
    -------
    BottomValues
        The casts table and the flagged samples.
    """
    c = casts.copy().sort_values("cast", kind="stable").reset_index(drop=True)
    lat = pd.Series(c["lat"].to_numpy(float), index=c["cast"])
    s = quality_control_samples(samples, lat, options)
    recorded = (c["bottom_depth_m"].to_numpy(float) if "bottom_depth_m" in c
                else np.full(len(c), np.nan))
    bathy = (c["cast"].map(floor_from_bathymetry).to_numpy(float)
             if floor_from_bathymetry is not None else np.full(len(c), np.nan))
    floor = np.where(np.isfinite(recorded), recorded, bathy)
    floor_source = np.where(np.isfinite(recorded), "recorded",
                            np.where(np.isfinite(bathy), "bathymetry", ""))
    good = s[s["sample_flag"] == "ok"]
    n_samples = s.groupby("cast").size().reindex(c["cast"]).fillna(0).astype(int).to_numpy()
    deepest = good.loc[good.groupby("cast")["depth_m"].idxmax()].set_index("cast")
    deepest = deepest.reindex(c["cast"])
    d0 = deepest["depth_m"].to_numpy(float)
    near = good[good["depth_m"].to_numpy(float) >= good["cast"].map(
        pd.Series(d0, index=c["cast"].to_numpy())).to_numpy(float) - options.average_m]
    agg = near.groupby("cast").agg(value=("temperature_c", "mean"),
                                   sal=("salinity", "mean"),
                                   n=("temperature_c", "size")).reindex(c["cast"])
    value = agg["value"].to_numpy(float)
    sal = agg["sal"].to_numpy(float)
    has = np.isfinite(d0)
    gap = floor - d0
    flag = np.full(len(c), "ok", dtype=object)
    detail = np.full(len(c), "", dtype=object)
    for i in np.flatnonzero(~has):
        flag[i] = "no_good_sample"
        detail[i] = (f"cast {c['cast'].iloc[i]}: none of its {n_samples[i]} samples passed "
                     "the profile checks")
    for i in np.flatnonzero(has & ~np.isfinite(floor)):
        flag[i] = "floor_unknown"
        detail[i] = (f"cast {c['cast'].iloc[i]}: no recorded bottom depth and no bathymetry "
                     "at its position, so its deepest sample cannot be checked against the "
                     "sea floor")
    with np.errstate(invalid="ignore"):
        far = has & np.isfinite(floor) & (gap > options.max_gap_m)
    for i in np.flatnonzero(far):
        flag[i] = "not_near_bottom"
        detail[i] = (f"cast {c['cast'].iloc[i]}: deepest good sample at {d0[i]:.1f} m, sea "
                     f"floor at {floor[i]:.1f} m ({floor_source[i]}): {gap[i]:.1f} m above "
                     f"the floor, more than {options.max_gap_m:g} m")
    check = np.flatnonzero(flag == "ok")
    if len(check):
        tf = freezing_point_c(np.where(np.isfinite(sal[check]), sal[check], default_salinity),
                              d0[check], c["lat"].to_numpy(float)[check],
                              c["lon"].to_numpy(float)[check])
        for i, f in zip(check, tf, strict=True):
            if value[i] < f - freeze_tolerance_c:
                flag[i] = "below_freezing"
                detail[i] = (f"cast {c['cast'].iloc[i]}: bottom value {value[i]:.3f} < freezing "
                             f"point {f:.3f} at {d0[i]:.1f} m - {freeze_tolerance_c:g}")
    sample_pos = deepest["sample"].to_numpy(float)
    bad = s[s["sample_flag"] != "ok"]
    counts = bad.groupby(["cast", "sample_flag"]).size()
    summary = {cast: "; ".join(f"{f} {int(n)}" for (_, f), n in g.items())
               for cast, g in counts.groupby(level=0)}
    res = pd.DataFrame({
        "flag": flag, "detail": detail,
        "bottom_c": np.where(flag == "ok", value, np.nan),
        "deepest_c": value, "salinity": sal, "gap_m": gap, "sample_depth_m": d0,
        "sample_pressure_dbar": deepest["pressure_dbar"].to_numpy(float),
        "n_averaged": agg["n"].fillna(0).to_numpy(int),
        "sample": ["" if not np.isfinite(v) else str(int(v)) for v in sample_pos],
    }, index=c.index)
    time = pd.to_datetime(c["time"])
    year = time.dt.year.astype(float)  # the survey year: given per cast, else the calendar year
    if "year" in c:
        year = c["year"].astype(float).fillna(year)
    table = pd.DataFrame({
        "year": [_fmt(v, 0) for v in year],
        "station": c["station"].fillna("").astype(str) if "station" in c else "",
        "date": time.dt.strftime("%Y-%m-%d").fillna(""),
        "lat": [_fmt(v, 5) for v in c["lat"].to_numpy(float)],
        "lon": [_fmt(v, 5) for v in c["lon"].to_numpy(float)],
        "depth_m": [_fmt(v, 1) for v in floor],
        "bottom_c": [_fmt(v, 3) for v in res["bottom_c"]],
        "salinity": [_fmt(v, 3) for v in res["salinity"]],
        "cast": c["cast"].astype(str),
        "time": time.dt.strftime("%Y-%m-%dT%H:%M:%S").fillna(""),
        "sample": res["sample"],
        "sample_depth_m": [_fmt(v, 2) for v in res["sample_depth_m"]],
        "sample_pressure_dbar": [_fmt(v, 2) for v in res["sample_pressure_dbar"]],
        "n_averaged": res["n_averaged"].astype(int).astype(str),
        "n_samples": n_samples.astype(str),
        "flagged_samples": [summary.get(k, "") for k in c["cast"]],
        "floor_source": floor_source,
        "gap_m": [_fmt(v, 2) for v in res["gap_m"]],
        "deepest_c": [_fmt(v, 3) for v in res["deepest_c"]],
        "profile_flag": res["flag"],
        "profile_detail": res["detail"],
    })
    table.insert(0, "row", np.arange(1, len(table) + 1))
    return BottomValues(casts=table, samples=s)


def apply_profile_flags(qc: QCResult, casts: pd.DataFrame) -> QCResult:
    """Carry each cast's profile flag into the cast quality control.

    A cast whose profile gave no acceptable bottom value has a blank ``bottom_c``,
    which the cast checks call ``missing``; its row takes the profile's reason and
    detail instead (``not_near_bottom`` with the gap, ...).

    Parameters
    ----------
    qc
        Result of :func:`coldindex.qc.run_qc` on ``casts``.
    casts
        The casts table of :func:`bottom_values` (``row``, ``profile_flag``,
        ``profile_detail``).

    Returns
    -------
    QCResult
        The same casts used; the flags of the profile-flagged rows replaced.
    """
    flags = casts.set_index("row")
    table = qc.table.copy()
    pf = table["row"].map(flags["profile_flag"]).fillna("ok")
    pd_ = table["row"].map(flags["profile_detail"]).fillna("")
    take = pf.ne("ok") & table["flag"].isin(["ok", "missing"])
    table.loc[take, "flag"] = pf[take]
    table.loc[take, "detail"] = pd_[take]
    keep = qc.casts[~qc.casts["row"].isin(table.loc[take, "row"])]
    return QCResult(table=table, casts=keep.reset_index(drop=True))
