"""The invented scenario: a subarctic shelf straddling 180°, 44 survey years.

Everything here is invented: the shelf, its station names, its ice, its models.
``python -m coldindex.demo DIR`` writes the same bytes every time in the same
environment; ``sample_inputs/`` in the repository is its committed output.

The physical story
------------------
* Winter sea-ice mass (November to May, labelled by the following summer) has
  a year-to-year AR(1) anomaly, a slow decline and a step loss after 2001.
* Heavy ice leaves a cold bottom pool on the middle shelf the next summer:
  the bottom temperature anomaly there scales with the winter's ice anomaly.
* Bottom water warms with depth toward the outer shelf (bathymetry written as
  NetCDF), warms slowly through the record and steps up after 2001 with the ice.
* Spatially correlated noise (exponential, length 90 km) and sensor noise on top;
  temperatures approach the freezing point smoothly, never below it.
* The survey runs east to west over about eight weeks from early June.
* One year (1987) sampled only the eastern half of the shelf (low coverage).
* Planted faults: a blank, a sentinel, an identical and a conflicting duplicate,
  a cast outside the domain, and a mistyped latitude.
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

from coldindex.config import TEMPLATE
from coldindex.domain import Domain, domain_from_polygon, wrap_lon
from coldindex.io.writers import atomic_path, write_bytes, write_csv, write_json

SEED = 4242
FIRST_YEAR, LAST_YEAR = 1982, 2025
STEP_YEAR = 2002  # first summer of the warm regime
SPACING_KM = 37.04  # 20 nautical miles
SHELF = [  # lon, lat of the invented shelf's outline (crosses 180°)
    (171.0, 59.0), (174.5, 58.2), (179.0, 57.8), (-176.5, 58.0), (-172.5, 58.6),
    (-170.0, 59.8), (-170.5, 61.5), (-172.5, 62.6), (-176.0, 63.2), (-179.5, 63.0),
    (176.5, 62.4), (173.0, 61.5), (171.0, 60.3), (171.0, 59.0),
]
MODELS = ("Aster", "Borea", "Cirrus", "Dunlin")
SCENARIOS = {"moderate": 0.012, "high": 0.032}  # warming after 2025, degC per year



def _polygon() -> Polygon:
    return Polygon(SHELF)


def _depth(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Invented bathymetry in the shelf's plane [km]: deepens to the south-west. [m]"""
    s = (-0.55 * x - 0.85 * y) / 600.0
    bumps = 12 * np.sin(x / 90.0) * np.cos(y / 70.0)
    return np.clip(70.0 + 80.0 * s + bumps, 25.0, 220.0)


def _cold_pool_shape(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Where the ice leaves its cold water: a broad patch on the middle shelf. [0..1]"""
    return np.exp(-(((x - 60.0) / 330.0) ** 2 + ((y - 40.0) / 190.0) ** 2))


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
    years = np.arange(FIRST_YEAR - 1, LAST_YEAR + 2)
    anomaly = np.zeros(len(years))
    for i in range(1, len(years)):
        anomaly[i] = 0.5 * anomaly[i - 1] + rng.normal(0, 0.85)
    anomaly += -0.015 * (years - 2000) - 0.7 * (years >= STEP_YEAR)
    winter = dict(zip(years.tolist(), anomaly.tolist(), strict=True))
    clim = {11: 0.8, 12: 2.6, 1: 4.4, 2: 5.6, 3: 6.1, 4: 5.5, 5: 3.2}  # invented, Gt
    rows = []
    for label in years[1:]:  # winter labelled by the summer that follows
        if label > LAST_YEAR + 1:
            break
        for month, base in clim.items():
            cal_year = label - 1 if month >= 11 else label
            if label == LAST_YEAR + 1 and month > 3:
                continue  # the newest winter is only known to March
            value = base * (1.0 + 0.22 * winter[int(label)] + rng.normal(0, 0.05))
            rows.append((int(cal_year), month, round(max(value, 0.0), 3)))
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
        the winter ice anomaly that drove each summer.
    """
    rng = np.random.default_rng(np.random.SeedSequence([seed]))
    dom = domain_from_polygon(_polygon())
    minx, miny, maxx, maxy = dom.polygon_xy.bounds
    inner = dom.polygon_xy.buffer(-8.0)
    gx = np.arange(np.ceil(minx / SPACING_KM), np.floor(maxx / SPACING_KM) + 1) * SPACING_KM
    gy = np.arange(np.ceil(miny / SPACING_KM), np.floor(maxy / SPACING_KM) + 1) * SPACING_KM
    xs, ys, names = [], [], []
    for j, yv in enumerate(gy[::-1]):
        for i, xv in enumerate(gx):
            if shapely.intersects_xy(inner, xv, yv):
                xs.append(xv)
                ys.append(yv)
                names.append(f"{chr(65 + j // 26)}{chr(65 + j % 26)}{i:02d}")
    sx, sy = np.array(xs), np.array(ys)
    slon, slat = dom.to_lonlat(sx, sy)
    depth = _depth(sx, sy)
    pool = _cold_pool_shape(sx, sy)
    ice, winter = _ice_series(rng)

    rows = []
    for year in range(FIRST_YEAR, LAST_YEAR + 1):
        r = np.random.default_rng(np.random.SeedSequence([seed, year]))
        take = r.uniform(size=len(sx)) > 0.03
        if year == 1987:
            take &= sx > np.median(sx)
        warm = 0.02 * (year - FIRST_YEAR) + 0.8 * (year >= STEP_YEAR)
        t = (0.3 + 0.022 * (depth - 70.0) + warm - 1.5 * winter[year] * pool
             - 0.9 * pool + 0.5 * _random_field(r, sx, sy, 90.0)
             + r.normal(0.0, 0.15, len(sx)))
        floor = -1.75
        t = floor + np.logaddexp(0.0, 4.0 * (t - floor)) / 4.0
        start = pd.Timestamp(year=year, month=6, day=1) + pd.Timedelta(days=int(r.integers(-5, 6)))
        days = 56.0 * (maxx - sx) / (maxx - minx) + r.uniform(0, 2, len(sx))
        for k in np.flatnonzero(take):
            date = start + pd.Timedelta(days=float(days[k]))
            rows.append((year, names[k], date.strftime("%Y-%m-%d"), round(float(slat[k]), 4),
                         round(float(wrap_lon(slon[k])), 4),
                         round(float(depth[k] + r.normal(0, 2)), 1), round(float(t[k]), 2)))
    casts = pd.DataFrame(rows, columns=["year", "station", "date", "lat", "lon", "depth_m",
                                        "bottom_c"])
    casts = _plant_faults(casts)

    traj = _trajectories(rng, casts)
    bathy = _bathymetry_dataset(dom)
    return Scenario(casts=casts, ice=ice, trajectories=traj, domain=_domain_geojson(),
                    bathymetry=bathy, winter_anomaly=winter)


def _plant_faults(casts: pd.DataFrame) -> pd.DataFrame:
    c = casts.copy()
    c["bottom_c"] = c["bottom_c"].map(lambda v: f"{v:.2f}")

    def first(year: int) -> int:
        return int(c.index[c["year"] == year][10])

    c.loc[first(2010), "bottom_c"] = ""  # a blank
    c.loc[first(2015), "bottom_c"] = "-9999"  # a sentinel
    c.loc[first(2023), "lat"] = float(c.loc[first(2023), "lat"]) * 10  # mistyped latitude
    ident = c.loc[[first(2018)]]
    conflict = c.loc[[first(2020)]].copy()
    conflict["bottom_c"] = f"{float(conflict['bottom_c'].iloc[0]) + 1.3:.2f}"
    outside = c.loc[[first(2022)]].copy()
    outside["station"] = "XX99"
    outside["lat"] = 56.9  # south of the shelf
    return pd.concat([c, ident, conflict, outside]).sort_values(["year", "date", "station"],
                                                                kind="stable")


def _trajectories(rng: np.random.Generator, casts: pd.DataFrame) -> pd.DataFrame:
    years = np.arange(FIRST_YEAR, 2101)
    rows = []
    for mi, model in enumerate(MODELS):
        bias = rng.normal(0.3, 0.5)
        members = ("r1", "r2") if mi == 0 else ("r1",)
        for scenario, rate in SCENARIOS.items():
            for member in members:
                key = [SEED, mi, len(scenario), len(member) + 7 * (member == "r2")]
                r = np.random.default_rng(np.random.SeedSequence(key))
                noise = np.zeros(len(years))
                for i in range(1, len(years)):
                    noise[i] = 0.45 * noise[i - 1] + r.normal(0, 0.55)
                trend = (0.02 * (years - FIRST_YEAR) + rate * np.clip(years - 2025, 0, None)
                         * (0.8 + 0.1 * mi))
                value = 1.2 + bias + trend + noise
                rows += [(model, scenario, member, int(y), round(float(v), 3))
                         for y, v in zip(years, value, strict=True)]
    return pd.DataFrame(rows, columns=["model", "scenario", "member", "year", "value"])


def _bathymetry_dataset(dom: Domain) -> xr.Dataset:
    lon = np.round(np.arange(168.0, 194.0001, 0.1), 4)  # 0..360 convention, on purpose
    lat = np.round(np.arange(56.5, 64.5001, 0.05), 4)
    LO, LA = np.meshgrid(lon, lat)
    x, y = dom.to_xy(LO, LA)
    depth = np.round(_depth(x, y), 1).astype("float32")
    ds = xr.Dataset(
        {"depth": (("lat", "lon"), depth, {"units": "m", "positive": "down",
                                           "long_name": "sea floor depth (invented)"})},
        coords={"lat": ("lat", lat, {"units": "degrees_north"}),
                "lon": ("lon", lon, {"units": "degrees_east"})},
        attrs={"title": "Invented bathymetry of the demo shelf", "Conventions": "CF-1.8"},
    )
    return ds


def _domain_geojson() -> dict:
    return {"type": "Feature", "properties": {"name": "invented demo shelf"},
            "geometry": {"type": "Polygon", "coordinates": [[list(p) for p in SHELF]]}}


def write_scenario(out: Path, seed: int = SEED) -> list[Path]:
    """Write the invented inputs into ``out`` and return the paths written."""
    out.mkdir(parents=True, exist_ok=True)
    sc = make_scenario(seed)
    paths = [
        write_csv(sc.casts, out / "casts.csv"),
        write_csv(sc.ice, out / "ice.csv"),
        write_csv(sc.trajectories, out / "trajectories.csv"),
        write_json(sc.domain, out / "domain.geojson"),
        write_bytes(TEMPLATE.encode(), out / "coldindex.toml"),
    ]
    with atomic_path(out / "bathymetry.nc") as tmp:
        sc.bathymetry.to_netcdf(tmp, engine="scipy", format="NETCDF3_64BIT")
    paths.append(out / "bathymetry.nc")
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
