"""The invented scenario: the Skelvarra Shelf, across 180° in the Southern Ocean.

Everything here is invented: the shelf, its outline and depths, its transects
and stations, its ice, its models and scenarios. ``python -m coldindex.demo DIR``
writes the same bytes every time in the same environment; ``sample_inputs/`` in
the repository is its committed output.

The physical story
------------------
* The shelf lies at about 60.5-63.6° S across 180°. Stations sit on numbered
  transects (``T07-S12``: transect 7, station 12), transects 30 km apart and
  stations 25 km apart along them.
* Winter sea ice (May to October) has a year-to-year AR(1) anomaly, a slow
  decline and a step loss from the winter before the 2010 survey on.
* The survey runs from mid January for about six weeks, transect by transect
  from west to east; it follows the winter of the year before, so the ice of
  winter W (May-October of W - 1) meets the survey of January W (lag 0).
* Heavy ice leaves a cold bottom pool over the shallow central bank; the bottom
  temperature anomaly there scales with the winter's ice anomaly.
* Bottom water warms with depth toward the shelf's edge and down a trough from
  the south-east (bathymetry written as NetCDF), warms slowly through the record
  and steps up from 2010 with the ice.
* Spatially correlated noise (exponential, length 80 km) and sensor noise on top;
  temperatures approach the freezing point smoothly, never below it.
* In 1997 only the western half of the shelf was sampled (low coverage).
* Planted faults: a blank, a sentinel, an identical and a conflicting duplicate,
  a cast outside the domain, and a latitude with its sign lost.

The raw sources
---------------
* ``profiles.nc``: a CTD profile for every cast with a bottom value (CF contiguous
  ragged array, pressure as CF ``sea_water_pressure``, atmosphere included), sampled
  every 5 dbar down to a few metres above the floor; the bottom water is well mixed
  over the lowest 40 % of the column. Planted: casts that stopped 40 m above the
  floor, a temperature spike, an upcast stored bottom first, and casts without a
  recorded bottom depth (the bathymetry file stands in).
* ``ice_fields.nc``: monthly ice concentration (%) and floe thickness on a 25 km
  polar stereographic grid over the shelf, April to November, its ice edge and
  thickness following the same winters as ``ice.csv``.
* ``coldindex-raw.toml`` runs the whole update from these two, the domain, the
  bathymetry and the trajectories.
"""

from __future__ import annotations

import sys
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import shapely
import xarray as xr
from shapely.geometry import Polygon

from coldindex.config import template
from coldindex.domain import Domain, domain_from_polygon, wrap_lon
from coldindex.io.writers import atomic_path, write_bytes, write_csv, write_json

SEED = 17
NAME = "Skelvarra Shelf"
FIRST_YEAR, LAST_YEAR = 1991, 2026  # survey years (January-February)
STEP_YEAR = 2010  # first survey of the warm regime
LOW_COVERAGE_YEAR = 1997
TRANSECT_KM, STATION_KM = 30.0, 25.0  # transect spacing, station spacing along a transect
SURVEY_DAYS = 42  # about six weeks
ICE_DECLINE = 0.008  # slow loss of winter ice, anomaly units per year
WARMING = 0.008  # slow warming of the bottom water, degC per year
STEP_WARMING = 2.0  # bottom-water step at STEP_YEAR, degC
ICE_PERSISTENCE = 0.3  # lag-1 autocorrelation of the winter ice anomaly (AR(1))
ICE_NOISE = 0.85  # year-to-year innovation of the winter ice anomaly
ICE_STEP = 0.5  # step loss of winter ice from the winter labelled STEP_YEAR, anomaly units
SHELF = [  # lon, lat of the invented shelf's outline, counter-clockwise (crosses 180°)
    (175.7, -61.5), (176.4, -62.5), (178.0, -63.2), (-179.6, -63.55), (-177.0, -63.4),
    (-175.2, -62.8), (-174.5, -61.9), (-175.3, -61.0), (-177.4, -60.55), (-179.8, -60.45),
    (178.3, -60.6), (176.6, -60.95), (175.7, -61.5),
]
ICE_MONTHS = {4: 0.6, 5: 1.5, 6: 2.7, 7: 3.8, 8: 4.6, 9: 5.0, 10: 4.4, 11: 2.9}  # Gt, invented
MODELS = ("Askel", "Brimvar", "Corrin", "Delvan")
SCENARIOS = {"gentle": 0.011, "steep": 0.03}  # warming after the last survey, degC per year


def _polygon() -> Polygon:
    return Polygon(SHELF)


def _depth(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Invented bathymetry in the shelf's plane [km]: a central bank, a south-east trough. [m]"""
    bank = ((x + 40.0) / 230.0) ** 2 + ((y - 15.0) / 150.0) ** 2
    trough = 75.0 * np.exp(-(((x - 0.9 * y - 170.0) / 50.0) ** 2)) * (y < 60.0)
    bumps = 9.0 * np.sin(x / 65.0) * np.cos(y / 50.0)
    return np.clip(58.0 + 120.0 * bank + trough + bumps, 30.0, 260.0)


def _cold_pool_shape(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Where the ice leaves its cold water: over the central bank. [0..1]"""
    return np.exp(-(((x + 30.0) / 240.0) ** 2 + ((y - 10.0) / 140.0) ** 2))


def _random_field(rng: np.random.Generator, x: np.ndarray, y: np.ndarray,
                  length_km: float, n_waves: int = 300) -> np.ndarray:
    """Unit-variance random field with exponential covariance, by random Fourier features.

    Frequencies from a bivariate Student t with one degree of freedom give the
    covariance ``exp(-h / length_km)`` in two dimensions.
    """
    g = np.sqrt(rng.chisquare(1.0, n_waves))[:, None]
    w = rng.standard_normal((n_waves, 2)) / (length_km * g)
    phase = rng.uniform(0, 2 * np.pi, n_waves)
    arg = np.outer(x, w[:, 0]) + np.outer(y, w[:, 1]) + phase
    return np.sqrt(2.0 / n_waves) * np.cos(arg).sum(axis=1)


def _ice_series(rng: np.random.Generator) -> tuple[pd.DataFrame, dict[int, float]]:
    """Monthly ice of calendar years, and each winter's anomaly by winter label.

    Winter W is May-October of calendar year W - 1, the winter before the survey
    of January W. The newest winter (before the next, unobserved survey) is complete.
    """
    labels = np.arange(FIRST_YEAR - 1, LAST_YEAR + 2)
    anomaly = np.zeros(len(labels))
    for i in range(1, len(labels)):
        anomaly[i] = ICE_PERSISTENCE * anomaly[i - 1] + rng.normal(0, ICE_NOISE)
    anomaly += -ICE_DECLINE * (labels - 2008) - ICE_STEP * (labels >= STEP_YEAR)
    winter = dict(zip(labels.tolist(), anomaly.tolist(), strict=True))
    rows = []
    for label in labels[1:]:
        for month, base in ICE_MONTHS.items():
            value = base * (1.0 + 0.22 * winter[int(label)] + rng.normal(0, 0.05))
            rows.append((int(label) - 1, month, round(max(value, 0.0), 3)))
    ice = pd.DataFrame(rows, columns=["year", "month", "ice"])
    return ice.sort_values(["year", "month"]).reset_index(drop=True), winter


@dataclass(frozen=True)
class Scenario:
    """The invented inputs, in memory."""

    casts: pd.DataFrame
    ice: pd.DataFrame
    trajectories: pd.DataFrame
    domain: dict
    bathymetry: xr.Dataset
    winter_anomaly: dict[int, float]


def make_scenario(seed: int = SEED) -> Scenario:
    """Build every invented input in memory.

    Parameters
    ----------
    seed
        Base seed of the scenario.

    Returns
    -------
    Scenario
        Casts, ice and trajectory frames, domain GeoJSON, bathymetry Dataset and
        the winter ice anomaly that drove each survey (by winter label).
    """
    rng = np.random.default_rng(np.random.SeedSequence([seed]))
    dom = domain_from_polygon(_polygon())
    minx, miny, maxx, maxy = dom.polygon_xy.bounds
    inner = dom.polygon_xy.buffer(-6.0)
    gx = np.arange(np.ceil(minx / TRANSECT_KM), np.floor(maxx / TRANSECT_KM) + 1) * TRANSECT_KM
    gy = np.arange(np.ceil(miny / STATION_KM), np.floor(maxy / STATION_KM) + 1) * STATION_KM
    xs, ys, names, order = [], [], [], []
    transect = 0
    for xv in gx:  # transects numbered west to east, stations north to south
        on = [yv for yv in gy[::-1] if shapely.intersects_xy(inner, xv, yv)]
        if not on:
            continue
        transect += 1
        for k, yv in enumerate(on):
            xs.append(xv)
            ys.append(yv)
            names.append(f"T{transect:02d}-S{k + 1:02d}")
            # the ship zigzags: north to south on odd transects, back north on even ones
            order.append(transect - 1 + (k + 0.5) / len(on) if transect % 2 else
                         transect - (k + 0.5) / len(on))
    sx, sy = np.array(xs), np.array(ys)
    slon, slat = dom.to_lonlat(sx, sy)
    depth = _depth(sx, sy)
    pool = _cold_pool_shape(sx, sy)
    progress = np.array(order) / transect  # 0..1 through the survey
    ice, winter = _ice_series(rng)

    rows = []
    for year in range(FIRST_YEAR, LAST_YEAR + 1):
        r = np.random.default_rng(np.random.SeedSequence([seed, year]))
        take = r.uniform(size=len(sx)) > 0.03
        if year == LOW_COVERAGE_YEAR:
            take &= sx < np.median(sx)
        warm = WARMING * (year - FIRST_YEAR) + STEP_WARMING * (year >= STEP_YEAR)
        t = (0.2 + 0.018 * (depth - 90.0) + warm - 1.5 * winter[year] * pool
             - 0.9 * pool + 0.5 * _random_field(r, sx, sy, 80.0)
             + r.normal(0.0, 0.15, len(sx)))
        floor = -1.85
        t = floor + np.logaddexp(0.0, 4.0 * (t - floor)) / 4.0
        start = pd.Timestamp(year=year, month=1, day=14) + pd.Timedelta(
            days=int(r.integers(-4, 5)))
        days = SURVEY_DAYS * progress + r.uniform(0, 1, len(sx))
        for i in np.flatnonzero(take):
            date = start + pd.Timedelta(days=float(days[i]))
            rows.append((year, names[i], date.strftime("%Y-%m-%d"), round(float(slat[i]), 4),
                         round(float(wrap_lon(slon[i])), 4),
                         round(float(depth[i] + r.normal(0, 2)), 1), round(float(t[i]), 2)))
    casts = pd.DataFrame(rows, columns=["year", "station", "date", "lat", "lon", "depth_m",
                                        "bottom_c"])
    casts = _plant_faults(casts)

    traj = _trajectories(seed)
    bathy = _bathymetry_dataset(dom)
    return Scenario(casts=casts, ice=ice, trajectories=traj, domain=_domain_geojson(),
                    bathymetry=bathy, winter_anomaly=winter)


def _plant_faults(casts: pd.DataFrame) -> pd.DataFrame:
    c = casts.copy()
    c["bottom_c"] = c["bottom_c"].map(lambda v: f"{v:.2f}")

    def pick(year: int) -> int:
        return int(c.index[c["year"] == year][12])

    c.loc[pick(2003), "bottom_c"] = ""  # a blank
    c.loc[pick(2008), "bottom_c"] = "-9999"  # a sentinel
    c.loc[pick(2021), "lat"] = -float(c.loc[pick(2021), "lat"])  # the latitude's sign lost
    ident = c.loc[[pick(2012)]]
    conflict = c.loc[[pick(2016)]].copy()
    conflict["bottom_c"] = f"{float(conflict['bottom_c'].iloc[0]) + 1.3:.2f}"
    outside = c.loc[[pick(2019)]].copy()
    outside["station"] = "T00-S00"
    outside["lat"] = -59.6  # north of the shelf
    return pd.concat([c, ident, conflict, outside]).sort_values(["year", "date", "station"],
                                                                kind="stable")


def _trajectories(seed: int) -> pd.DataFrame:
    years = np.arange(FIRST_YEAR, 2101)
    rows = []
    for mi, model in enumerate(MODELS):
        bias = np.random.default_rng(np.random.SeedSequence([seed, 900, mi])).normal(0.3, 0.5)
        members = ("r1", "r2") if mi == 0 else ("r1",)
        for si, (scenario, rate) in enumerate(SCENARIOS.items()):
            for ki, member in enumerate(members):
                r = np.random.default_rng(np.random.SeedSequence([seed, 901, mi, si, ki]))
                noise = np.zeros(len(years))
                for i in range(1, len(years)):
                    noise[i] = 0.45 * noise[i - 1] + r.normal(0, 0.55)
                trend = (0.02 * (years - FIRST_YEAR) + rate
                         * np.clip(years - LAST_YEAR, 0, None) * (0.8 + 0.1 * mi))
                value = 1.0 + bias + trend + noise
                rows += [(model, scenario, member, int(y), round(float(v), 3))
                         for y, v in zip(years, value, strict=True)]
    return pd.DataFrame(rows, columns=["model", "scenario", "member", "year", "value"])


def _bathymetry_dataset(dom: Domain) -> xr.Dataset:
    lon = np.round(np.arange(174.0, 187.0001, 0.1), 4)  # 0..360 convention, on purpose
    lat = np.round(np.arange(-64.5, -59.4999, 0.05), 4)
    LO, LA = np.meshgrid(lon, lat)
    x, y = dom.to_xy(LO, LA)
    depth = np.round(_depth(x, y), 1).astype("float32")
    ds = xr.Dataset(
        {"depth": (("lat", "lon"), depth, {"units": "m", "positive": "down",
                                           "long_name": "sea floor depth (invented)"})},
        coords={"lat": ("lat", lat, {"units": "degrees_north"}),
                "lon": ("lon", lon, {"units": "degrees_east"})},
        attrs={"title": f"Invented bathymetry of the {NAME}", "Conventions": "CF-1.8"},
    )
    return ds


def _domain_geojson() -> dict:
    return {"type": "Feature", "properties": {"name": f"{NAME} (invented)"},
            "geometry": {"type": "Polygon", "coordinates": [[list(p) for p in SHELF]]}}


STRATA = {  # invented management strata: longitude bands across the shelf (lon west, east)
    "west stratum": (175.0, 178.5), "central stratum": (178.5, -178.0),
    "east stratum": (-178.0, -174.0)}
DEPTH_ZONES = "0-100,100-150,150-300"  # inner, middle and outer shelf [m]


def _strata_geojson() -> dict:
    """The strata as lon/lat boxes reaching past the shelf (the domain clips them)."""
    feats = []
    for name, (w, e) in STRATA.items():
        east = e + 360.0 if e < w else e  # a band that crosses 180 degrees
        ring = [[w, -64.0], [east, -64.0], [east, -60.0], [w, -60.0], [w, -64.0]]
        ring = [[float(wrap_lon(lon)) if lon > 180 else lon, lat] for lon, lat in ring]
        feats.append({"type": "Feature", "properties": {"name": name},
                      "geometry": {"type": "Polygon", "coordinates": [ring]}})
    return {"type": "FeatureCollection", "features": feats}


_INPUTS = {"domain": "domain.geojson", "bathymetry": "bathymetry.nc",
           "trajectories": ["trajectories.csv"], "regions": "strata.geojson"}
_SETTINGS = {"skill": {"months": "5-10"}, "index": {"depth_zones": DEPTH_ZONES}}


def _config_text() -> str:
    """The sample configuration: casts, monthly ice, the austral winter months, strata, zones."""
    return template("casts.csv", {**_INPUTS, "ice": "ice.csv"}, _SETTINGS)


PROFILE_STEP_DBAR = 5.0  # CTD bin size of the invented profiles
STOPPED_SHORT = 12  # casts whose profile ends 40 m above the floor
NO_FLOOR = 25  # casts without a recorded bottom depth
ICE_GRID_M = 25000.0  # ice-field grid spacing
ICE_FIELD_MONTHS = (4, 5, 6, 7, 8, 9, 10, 11)


def _clean_casts(casts: pd.DataFrame) -> pd.DataFrame:
    """The casts as sampled: planted duplicates, the outside cast and lost signs undone."""
    c = casts[casts["station"] != "T00-S00"].copy()
    c["lat"] = -c["lat"].astype(float).abs()
    c = c.drop_duplicates(["year", "station", "date"], keep="first")
    value = pd.to_numeric(c["bottom_c"], errors="coerce")
    return c[value.between(-3.0, 30.0)].assign(bottom_c=value).reset_index(drop=True)


def make_profiles(sc: Scenario, seed: int = SEED) -> xr.Dataset:
    """Invented CTD profiles for the casts, as a CF contiguous ragged array.

    Parameters
    ----------
    sc
        The scenario (its casts give position, date, floor and bottom temperature).
    seed
        Base seed.

    Returns
    -------
    xarray.Dataset
        ``featureType = "profile"``; temperature, pressure (atmosphere included) and
        salinity packed as 16-bit integers.
    """
    import gsw

    from coldindex.profiles import ATMOSPHERE_DBAR

    c = _clean_casts(sc.casts)
    r = np.random.default_rng(np.random.SeedSequence([seed, 77]))
    n = len(c)
    pick = r.permutation(n)
    short = set(pick[:STOPPED_SHORT].tolist())
    no_floor = set(pick[STOPPED_SHORT:STOPPED_SHORT + NO_FLOOR].tolist())
    spike, upcast = int(pick[-1]), int(pick[-2])
    temps, pres, sals, counts = [], [], [], []
    for i, row in enumerate(c.itertuples(index=False)):
        floor = float(row.depth_m)
        stop = floor - r.uniform(2.0, 6.0) - (40.0 if i in short else 0.0)
        depth = np.arange(5.0, stop + 1e-9, PROFILE_STEP_DBAR)
        if depth.size == 0 or depth[-1] < stop - 1.0:
            depth = np.append(depth, stop)
        mixed = 0.6 * floor  # the bottom water is well mixed below this depth
        surface = max(float(row.bottom_c), 0.6) + r.uniform(0.3, 1.5)
        shape = np.clip(1.0 - depth / mixed, 0.0, 1.0) ** 2
        t = row.bottom_c + (surface - row.bottom_c) * shape + r.normal(0, 0.002, depth.size)
        if i == spike:
            t[len(t) // 2] += 8.0
        s = 34.25 - 0.35 * shape + r.normal(0, 0.003, depth.size)
        p = gsw.p_from_z(-depth, float(row.lat)) + ATMOSPHERE_DBAR
        if i == upcast:
            t, s, p = t[::-1], s[::-1], p[::-1]
        temps.append(t)
        sals.append(s)
        pres.append(p)
        counts.append(depth.size)
    floor_rec = c["depth_m"].astype(float).to_numpy().copy()
    floor_rec[sorted(no_floor)] = np.nan
    hours = r.uniform(0.0, 24.0, n)
    times = (pd.to_datetime(c["date"]) + pd.to_timedelta(np.round(hours * 60), unit="min"))
    cast_id = (c["year"].astype(str) + "-" + c["station"]).to_numpy()
    packed = {"dtype": "int16", "_FillValue": np.int16(-32768)}
    ds = xr.Dataset(
        {
            "profile_id": (("profile",), cast_id.astype("U"), {"cf_role": "profile_id",
                                                              "long_name": "cast id"}),
            "station": (("profile",), c["station"].to_numpy().astype("U"),
                        {"long_name": "station name"}),
            "time": (("profile",), times.to_numpy(), {"standard_name": "time",
                                                      "axis": "T"}),
            "lat": (("profile",), c["lat"].astype(float).to_numpy(),
                    {"standard_name": "latitude", "units": "degrees_north"}),
            "lon": (("profile",), c["lon"].astype(float).to_numpy(),
                    {"standard_name": "longitude", "units": "degrees_east"}),
            "bottom_depth": (("profile",), floor_rec.astype("float32"), {
                "standard_name": "sea_floor_depth_below_sea_surface", "units": "m",
                "long_name": "echo-sounder depth at the cast (invented)"}),
            "row_size": (("profile",), np.asarray(counts, "int32"), {
                "sample_dimension": "obs", "long_name": "samples in each profile"}),
            "temperature": (("obs",), np.concatenate(temps), {
                "standard_name": "sea_water_temperature", "units": "degC",
                "coordinates": "time lat lon pressure"}),
            "pressure": (("obs",), np.concatenate(pres), {
                "standard_name": "sea_water_pressure", "units": "dbar", "positive": "down",
                "comment": "absolute pressure: sea pressure plus one standard atmosphere"}),
            "salinity": (("obs",), np.concatenate(sals), {
                "standard_name": "sea_water_practical_salinity", "units": "1"}),
        },
        attrs={"Conventions": "CF-1.8", "featureType": "profile",
               "title": f"Invented CTD profiles of the {NAME} survey"},
    )
    ds["time"].encoding.update({"units": "minutes since 1990-01-01 00:00:00",
                                "calendar": "standard", "dtype": "int32"})
    ds["temperature"].encoding.update(packed, scale_factor=0.001, add_offset=5.0)
    ds["pressure"].encoding.update(packed, scale_factor=0.01, add_offset=150.0)
    ds["salinity"].encoding.update(packed, scale_factor=0.001, add_offset=30.0)
    return ds


def make_ice_fields(sc: Scenario) -> xr.Dataset:
    """Invented monthly ice concentration and floe thickness on a polar stereographic grid.

    The ice edge advances from the south over the shelf with the month's ice in
    ``sc.ice``; the floes thicken with it. Concentration in percent.
    """
    import pyproj

    crs = pyproj.CRS.from_cf({"grid_mapping_name": "polar_stereographic",
                              "straight_vertical_longitude_from_pole": 180.0,
                              "latitude_of_projection_origin": -90.0,
                              "standard_parallel": -70.0, "false_easting": 0.0,
                              "false_northing": 0.0, "semi_major_axis": 6378137.0,
                              "inverse_flattening": 298.257223563})
    dom = domain_from_polygon(_polygon())
    fwd = pyproj.Transformer.from_crs(crs.geodetic_crs, crs, always_xy=True)
    inv = pyproj.Transformer.from_crs(crs, crs.geodetic_crs, always_xy=True)
    lon_o, lat_o = np.array(SHELF).T
    px, py = fwd.transform(lon_o, lat_o)
    x = np.arange(np.floor(min(px) / ICE_GRID_M) - 2, np.ceil(max(px) / ICE_GRID_M) + 3)
    x = x * ICE_GRID_M
    y = np.arange(np.floor(min(py) / ICE_GRID_M) - 2, np.ceil(max(py) / ICE_GRID_M) + 3)
    y = y * ICE_GRID_M
    X, Y = np.meshgrid(x, y)
    lon, lat = inv.transform(X, Y)
    _, north = dom.to_xy(lon, lat)  # km north in the shelf's own plane
    lo_y, hi_y = dom.polygon_xy.bounds[1], dom.polygon_xy.bounds[3]
    ice = sc.ice[sc.ice["month"].isin(ICE_FIELD_MONTHS)].sort_values(["year", "month"])
    conc, thick = [], []
    for v in ice["ice"].to_numpy(float):
        share = np.clip(v / 6.5, 0.0, 1.0)  # share of the shelf under ice
        edge = lo_y - 40.0 + share * (hi_y - lo_y + 80.0)
        c = 95.0 * np.clip((edge - north) / 80.0 + 0.5, 0.0, 1.0)
        conc.append(c)
        thick.append(np.where(c > 0, 0.25 + 0.12 * v + 0.002 * (edge - north).clip(0), np.nan))
    times = pd.to_datetime({"year": ice["year"], "month": ice["month"], "day": 15})
    cf = crs.to_cf()
    dims = ("time", "y", "x")
    ds = xr.Dataset(
        {
            "siconc": (dims, np.asarray(conc), {
                "standard_name": "sea_ice_area_fraction", "units": "%",
                "grid_mapping": "polar_stereographic", "cell_methods": "time: mean",
                "coordinates": "lat lon"}),
            "sithick": (dims, np.asarray(thick), {
                "standard_name": "sea_ice_thickness", "units": "m",
                "grid_mapping": "polar_stereographic",
                "cell_methods": "area: mean where sea_ice time: mean",
                "coordinates": "lat lon"}),
            "polar_stereographic": ((), np.int32(0), cf),
        },
        coords={
            "time": ("time", times.to_numpy(), {"standard_name": "time"}),
            "y": ("y", y, {"standard_name": "projection_y_coordinate", "units": "m"}),
            "x": ("x", x, {"standard_name": "projection_x_coordinate", "units": "m"}),
            "lat": (("y", "x"), np.round(lat, 5), {"standard_name": "latitude",
                                                   "units": "degrees_north"}),
            "lon": (("y", "x"), np.round(lon, 5), {"standard_name": "longitude",
                                                   "units": "degrees_east"}),
        },
        attrs={"Conventions": "CF-1.8",
               "title": f"Invented monthly sea ice over the {NAME}"},
    )
    ds["time"].encoding.update({"units": "days since 1990-01-01", "calendar": "standard",
                                "dtype": "int32"})
    ds["siconc"].encoding.update({"dtype": "int16", "_FillValue": np.int16(-32768),
                                  "scale_factor": 0.01})
    ds["sithick"].encoding.update({"dtype": "int16", "_FillValue": np.int16(-32768),
                                   "scale_factor": 0.001})
    return ds


def _raw_config_text() -> str:
    """The sample configuration that starts from the raw sources: profiles and ice fields."""
    return template(None, {"profiles": "profiles.nc", **_INPUTS,
                           "ice_fields": ["ice_fields.nc"]}, _SETTINGS)


def write_scenario(out: Path, seed: int = SEED) -> list[Path]:
    """Write the invented inputs into ``out`` and return the paths written."""
    out.mkdir(parents=True, exist_ok=True)
    sc = make_scenario(seed)
    paths = [
        write_csv(sc.casts, out / "casts.csv"),
        write_csv(sc.ice, out / "ice.csv"),
        write_csv(sc.trajectories, out / "trajectories.csv"),
        write_json(sc.domain, out / "domain.geojson"),
        write_json(_strata_geojson(), out / "strata.geojson"),
        write_bytes(_config_text().encode(), out / "coldindex.toml"),
    ]
    with atomic_path(out / "bathymetry.nc") as tmp:
        sc.bathymetry.to_netcdf(tmp, engine="scipy", format="NETCDF3_64BIT")
    paths.append(out / "bathymetry.nc")
    for name, ds in (("profiles.nc", make_profiles(sc, seed)),
                     ("ice_fields.nc", make_ice_fields(sc))):
        with atomic_path(out / name) as tmp:
            ds.to_netcdf(tmp, engine="scipy", format="NETCDF3_64BIT")
        paths.append(out / name)
    paths.append(write_bytes(_raw_config_text().encode(), out / "coldindex-raw.toml"))
    return paths


def main(argv: list[str] | None = None) -> int:
    """Entry point of ``python -m coldindex.demo DIR``."""
    args = sys.argv[1:] if argv is None else argv
    out = Path(args[0]) if args else Path("sample_inputs")
    for p in write_scenario(out):
        sys.stdout.write(f"{p}\n")
    return 0


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
