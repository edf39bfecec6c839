"""Cast quality control: every cast gets ``ok`` or a named reason.

Flagged casts are excluded from the indices and listed, never silently
dropped. Duplicates share a year, a station (a position rounded to 1 km only for
casts without a station name) and a date (and time, when given); they are
resolved by an order-free rule: identical copies collapse to one, conflicting
copies are all flagged. A file whose latitudes are mostly out
of range (swapped columns) is refused as a whole.
"""

from __future__ import annotations

from dataclasses import dataclass

import gsw
import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray

from coldindex.domain import KM_PER_DEG, Domain, circular_mean_lon, unwrap_lon, wrap_lon
from coldindex.errors import InputError

SENTINELS = (-99999.0, -9999.0, -999.0, 999.0, 9999.0, 99999.0)
TEMPERATURE_SENTINELS = (-99.0, -99.9, 99.0, 99.9)
DATE_SLACK_DAYS = 92  # a survey may straddle the new year by up to a quarter (no source)
REQUIRED = ("year", "lat", "lon", "bottom_c")
NUMERIC = ("year", "lat", "lon", "bottom_c", "depth_m", "salinity", "surface_c")
VALUE_COLUMNS = ("station", "lat", "lon", "bottom_c", "date", "depth_m", "salinity", "surface_c")


def freezing_point_c(salinity: ArrayLike, depth_m: ArrayLike, lat: ArrayLike,
                     lon: ArrayLike) -> NDArray[np.float64]:
    """In-situ freezing temperature of air-saturated seawater (TEOS-10). [°C]

    Parameters
    ----------
    salinity
        Practical salinity (PSS-78).
    depth_m
        Depth, positive down; NaN is taken as the surface. [m]
    lat, lon
        Position (for pressure and Absolute Salinity). [degrees]

    Returns
    -------
    numpy.ndarray
        Freezing temperature, ITS-90. [°C]

    References
    ----------
    IOC, SCOR and IAPSO (2010). The international thermodynamic equation of
    seawater - 2010. Manual and Guides 56, UNESCO, section 3.33 (t_freezing).
    """
    lat_a = np.asarray(lat, float)
    depth = np.nan_to_num(np.asarray(depth_m, float), nan=0.0)
    p = gsw.p_from_z(-np.abs(depth), lat_a)
    sa = gsw.SA_from_SP(np.asarray(salinity, float), p, wrap_lon(lon), lat_a)
    return np.asarray(gsw.t_freezing(sa, p, 1.0), dtype=float)


@dataclass(frozen=True)
class QCResult:
    """Outcome of quality control.

    Attributes
    ----------
    table
        Every input row: ``row``, typed values, ``flag`` and ``detail``.
    casts
        The casts used (flag ``ok``), typed, with ``doy`` (day of year, NaN without date).
    """

    table: pd.DataFrame
    casts: pd.DataFrame

    def counts_by_year(self) -> pd.DataFrame:
        """Per-year counts of used casts and of each flag reason, plus median day of year."""
        t = self.table.copy()
        t["year"] = t["year"].fillna(-1).astype(int)
        counts = pd.crosstab(t["year"], t["flag"])
        if "ok" not in counts.columns:
            counts["ok"] = 0
        med = self.casts.groupby("year")["doy"].median()
        counts["median_doy"] = med.reindex(counts.index)
        return counts


def _to_number(s: pd.Series) -> tuple[pd.Series, pd.Series, pd.Series]:
    """Return (values, blank mask, non-numeric mask) of a string column."""
    text = s.fillna("").astype(str).str.strip()
    blank = text.eq("") | text.str.lower().isin(["na", "nan", "null", "none", "-"])
    values = pd.to_numeric(text.where(~blank), errors="coerce")
    bad = values.isna() & ~blank
    values = values.where(np.isfinite(values.astype(float)))
    bad |= values.isna() & ~blank
    return values.astype(float), blank, bad


def _position_key(lat: pd.Series, lon: pd.Series) -> pd.Series:
    """A position rounded to 1 km, written as a readable station label."""
    lon0 = circular_mean_lon(lon.dropna()) if lon.notna().any() else 0.0
    ylat = np.round(lat.to_numpy(float) * KM_PER_DEG)
    lat_r = ylat / KM_PER_DEG
    coslat = np.cos(np.deg2rad(lat_r))
    xlon = np.round(unwrap_lon(lon.to_numpy(float), lon0) * KM_PER_DEG * coslat)
    with np.errstate(invalid="ignore", divide="ignore"):
        lon_r = wrap_lon(xlon / (KM_PER_DEG * coslat) + 0.0)
    return pd.Series([f"{a:.3f}_{b:.3f}" for a, b in zip(lat_r, lon_r, strict=True)],
                     index=lat.index)


def _resolve_duplicates(df: pd.DataFrame, key: pd.Series, flag: pd.Series,
                        detail: pd.Series, what: str) -> None:
    """Flag duplicates among ``ok`` rows sharing (year, key); order-free."""
    ok = flag.eq("ok")
    # Only keys that occur twice can hold duplicates: group those alone (building the
    # groups of thousands of single rows was most of the QC's time).
    pair = pd.DataFrame({"year": df.loc[ok, "year"], "key": key[ok]})
    ok &= pair.duplicated(keep=False).reindex(df.index, fill_value=False)
    sub = df[ok]
    groups = sub.groupby([sub["year"], key[ok]], sort=False).groups
    cols = [c for c in VALUE_COLUMNS if c in df.columns]
    for (yr, k), idx in groups.items():
        if len(idx) < 2:
            continue
        block = df.loc[idx, cols]
        identical = all(block[c].astype(str).nunique(dropna=False) == 1 for c in cols)
        rows = df.loc[idx, "row"]
        if identical:
            keep = rows.idxmin()
            for i in idx:
                if i != keep:
                    flag[i] = "duplicate_copy"
                    detail[i] = f"identical to row {int(rows[keep])} ({what} {k}, {int(yr)})"
        else:
            listed = ", ".join(str(int(r)) for r in sorted(rows))
            for i in idx:
                flag[i] = "duplicate_conflict"
                detail[i] = f"rows {listed} share {what} {k} in {int(yr)} with different values"


def run_qc(raw: pd.DataFrame, domain: Domain | None = None, *, source: str = "casts",
           freeze_tolerance_c: float = 0.2, max_bottom_c: float = 20.0,
           default_salinity: float = 34.0) -> QCResult:
    """Quality-control casts read as strings.

    Parameters
    ----------
    raw
        Casts as returned by :func:`coldindex.io.readers.read_casts` (strings, and ``row``:
        the row as a spreadsheet shows the file, header = row 1), whose row numbers every
        detail that names a row repeats.
    domain
        Survey domain; casts outside it are flagged. None skips that check.
    source
        File name for messages.
    freeze_tolerance_c
        How far below the freezing point a reading may lie (sensor tolerance). [°C]
    max_bottom_c
        Highest plausible bottom temperature. [°C]
    default_salinity
        Practical salinity for the freezing point where a cast has none.

    Returns
    -------
    QCResult
        Every row with its flag, and the casts used.
    """
    raw = raw.reset_index(drop=True)  # the rules below address rows by a unique index
    n = len(raw)
    flag = pd.Series(["ok"] * n, index=raw.index, dtype=object)
    detail = pd.Series([""] * n, index=raw.index, dtype=object)
    df = pd.DataFrame({"row": raw["row"].to_numpy()}, index=raw.index)

    def mark(mask: pd.Series, reason: str, text: pd.Series | str) -> None:
        m = mask & flag.eq("ok")
        flag[m] = reason
        detail[m] = text if isinstance(text, str) else text[m]

    for col in NUMERIC:
        if col not in raw.columns:
            df[col] = np.nan
            continue
        values, blank, bad = _to_number(raw[col])
        df[col] = values
        if col in REQUIRED:
            mark(blank, "missing", f"{col} is blank")
        mark(bad, "non_numeric", col + " = " + raw[col].astype(str).str.slice(0, 40))
        sentinels = SENTINELS + (TEMPERATURE_SENTINELS if col.endswith("_c") else ())
        is_sent = values.isin(sentinels)
        mark(is_sent, "sentinel", col + " = " + values.astype(str))
        if col not in REQUIRED:  # optional values: a bad one is dropped, not fatal
            df.loc[is_sent | bad, col] = np.nan
    df["station"] = raw["station"].astype(str) if "station" in raw.columns else ""
    df["date"] = raw["date"].astype(str) if "date" in raw.columns else ""

    bad_year = df["year"].notna() & ((df["year"] - np.round(df["year"])).abs().gt(0)
                                     | df["year"].lt(1000) | df["year"].gt(3000))
    mark(bad_year, "non_numeric", "year = " + df["year"].astype(str) + " is not a year")
    df.loc[bad_year, "year"] = np.nan
    # A date more than a quarter outside its labelled year is a typo, not a survey that
    # straddles the new year (whose casts lie within weeks of the label's year).
    when = pd.to_datetime(df["date"].where(df["date"].str.len() > 0), errors="coerce",
                          format="mixed")
    start = pd.to_datetime(df["year"].astype("Int64").astype(str) + "-01-01", errors="coerce")
    days = (when - start).dt.days
    mark(days.lt(-DATE_SLACK_DAYS) | days.gt(365 + DATE_SLACK_DAYS), "date_outside_year",
         "date " + df["date"] + " lies outside year " + df["year"].astype("Int64").astype(str))

    lat_ok = df["lat"].notna()
    if lat_ok.sum() > 0:
        share = float((df.loc[lat_ok, "lat"].abs() > 90).mean())
        if share > 0.5:
            raise InputError(f"{source}: {share:.0%} of the values in column 'lat' lie outside "
                             "-90..90; latitude and longitude look swapped, map them with "
                             "{option} (lat = your longitude's header, lon = your latitude's).",
                             option=("", "columns"))
    mark(df["lat"].abs().gt(90), "lat_out_of_range", "lat = " + df["lat"].astype(str))
    mark(df["lon"].lt(-180) | df["lon"].gt(360), "lon_out_of_range",
         "lon = " + df["lon"].astype(str))
    df["lon"] = wrap_lon(df["lon"].to_numpy(float))

    ok = flag.eq("ok")
    sal = df["salinity"].fillna(default_salinity)
    tf = pd.Series(np.nan, index=df.index)
    if ok.any():
        tf[ok] = freezing_point_c(sal[ok], df.loc[ok, "depth_m"], df.loc[ok, "lat"],
                                  df.loc[ok, "lon"])
    cold = df["bottom_c"] < tf - freeze_tolerance_c
    mark(cold, "below_freezing", "bottom_c = " + df["bottom_c"].astype(str) +
         " < freezing point " + tf.round(2).astype(str) + " - " + str(freeze_tolerance_c))
    mark(df["bottom_c"].gt(max_bottom_c), "above_max",
         "bottom_c = " + df["bottom_c"].astype(str) + " > " + str(max_bottom_c))

    if domain is not None:
        ok = flag.eq("ok")
        inside = pd.Series(True, index=df.index)
        if ok.any():
            inside[ok] = domain.contains(df.loc[ok, "lon"], df.loc[ok, "lat"])
        mark(~inside, "outside_domain", "position " + df["lat"].round(4).astype(str) + ", " +
             df["lon"].round(4).astype(str) + " is outside the domain")

    pos = pd.Series("", index=df.index, dtype=object)
    ok = flag.eq("ok")
    if ok.any():
        pos[ok] = _position_key(df.loc[ok, "lat"], df.loc[ok, "lon"])
    has_station = df["station"].str.len().gt(0)
    df["station"] = df["station"].where(has_station, pos)
    # A duplicate is the same station (a position only without a station name) on the
    # same date (and time, when given); repeat casts on other days are kept.
    when_key = when.dt.strftime("%Y-%m-%d %H:%M:%S").str.removesuffix(" 00:00:00")
    date_key = when_key.where(when.notna(), df["date"].str.strip())
    on_date = pd.Series(np.where(date_key.str.len() > 0, " on " + date_key, ""),
                        index=df.index)
    if has_station.any():
        _resolve_duplicates(df, (df["station"] + on_date).where(has_station), flag, detail,
                            "station")
    _resolve_duplicates(df, (pos + on_date).where(~has_station), flag, detail, "position")

    dates = pd.to_datetime(df["date"].where(df["date"].str.len() > 0), errors="coerce",
                           format="mixed")
    df["doy"] = dates.dt.day_of_year.astype(float)
    df["year"] = df["year"].astype("Int64")
    df["flag"] = flag
    df["detail"] = detail
    casts = df[flag.eq("ok")].drop(columns=["flag", "detail"]).copy()
    casts["year"] = casts["year"].astype(int)
    casts = casts.sort_values(["year", "station", "row"], kind="stable").reset_index(drop=True)
    return QCResult(table=df.reset_index(drop=True), casts=casts)


def year_hashes(table: pd.DataFrame) -> dict[str, str]:
    """SHA-256 of each survey year's input rows, over canonically sorted rows.

    Row numbers, flags and row order do not enter, so reordering a file changes
    no hash while changing any value of a year changes that year's hash.

    Parameters
    ----------
    table
        :attr:`QCResult.table`.

    Returns
    -------
    dict
        ``{year: hex digest}``; rows without a readable year under ``"unknown"``.
    """
    import hashlib

    cols = ["year", "station", "date", "lat", "lon", "depth_m", "bottom_c", "salinity",
            "surface_c"]
    sub = table[cols]
    text = sub.astype(object).where(sub.notna(), "").astype(str)  # str(v), "" for missing
    rows = text[cols[0]].str.cat([text[c] for c in cols[1:]], sep="\t")  # vectorised joins
    out: dict[str, str] = {}
    for yr, g in rows.groupby(text["year"], sort=True):
        key = str(yr) if yr else "unknown"
        out[key] = hashlib.sha256("\n".join(sorted(g.tolist())).encode()).hexdigest()
    return out
