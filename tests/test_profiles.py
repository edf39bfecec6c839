"""Profiles to bottom values: QC, the near-bottom rule, TEOS-10 depth, the DSG layouts."""

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from coldindex.config import ProfileOptions
from coldindex.errors import InputError
from coldindex.io.profiles import read_profiles
from coldindex.profiles import (
    ATMOSPHERE_DBAR,
    bottom_values,
    depth_from_pressure,
    quality_control_samples,
    spike_test,
)


def _casts(ids, floors, lat=-62.0, lon=179.5):
    return pd.DataFrame({"cast": ids, "station": [f"S{i}" for i in range(len(ids))],
                         "time": pd.to_datetime(["2020-01-20"] * len(ids)),
                         "lat": lat, "lon": lon, "bottom_depth_m": floors,
                         "year": np.nan})


def _samples(cast, depths, temps, sal=34.3):
    return pd.DataFrame({"cast": cast, "sample": np.arange(len(depths)),
                         "temperature_c": temps, "depth_m": depths, "pressure_dbar": np.nan,
                         "salinity": sal})


def test_bottom_value_is_the_deepest_good_sample():
    depths = np.arange(2.0, 98.0, 5.0)  # deepest at 97 m, floor at 100 m
    temps = 1.5 - 0.02 * depths
    res = bottom_values(_samples("A", depths, temps), _casts(["A"], [100.0]), ProfileOptions())
    row = res.casts.iloc[0]
    assert row["profile_flag"] == "ok"
    assert float(row["bottom_c"]) == pytest.approx(1.5 - 0.02 * 97.0, abs=5e-4)
    assert row["sample"] == str(len(depths) - 1)
    assert float(row["sample_depth_m"]) == 97.0
    assert float(row["gap_m"]) == pytest.approx(3.0)
    assert row["floor_source"] == "recorded" and float(row["depth_m"]) == 100.0


def test_a_cast_40_m_above_the_floor_is_flagged_with_its_gap():
    depths = np.arange(2.0, 62.0, 5.0)  # deepest 57 m over a 97 m floor
    res = bottom_values(_samples("B", depths, np.full(len(depths), 0.4)), _casts(["B"], [97.0]),
                        ProfileOptions())
    row = res.casts.iloc[0]
    assert row["profile_flag"] == "not_near_bottom"
    assert row["bottom_c"] == ""  # never used by the indices
    assert float(row["deepest_c"]) == pytest.approx(0.4)
    assert float(row["gap_m"]) == pytest.approx(40.0)
    assert "40.0 m above the floor" in row["profile_detail"]
    # a wider allowance accepts it
    wide = bottom_values(_samples("B", depths, np.full(len(depths), 0.4)),
                         _casts(["B"], [97.0]), ProfileOptions(max_gap_m=45.0))
    assert wide.casts.iloc[0]["profile_flag"] == "ok"


def test_recorded_bottom_depth_preferred_to_bathymetry_and_floor_unknown():
    s = pd.concat([_samples("A", [5.0, 50.0, 95.0], [1.0, 0.5, 0.2]),
                   _samples("B", [5.0, 50.0, 95.0], [1.0, 0.5, 0.2]),
                   _samples("C", [5.0, 50.0, 95.0], [1.0, 0.5, 0.2])])
    casts = _casts(["A", "B", "C"], [100.0, np.nan, np.nan])
    bathy = pd.Series({"A": 300.0, "B": 101.0})  # wrong on a slope for A: not used there
    res = bottom_values(s, casts, ProfileOptions(), bathy).casts.set_index("cast")
    assert res.loc["A", "floor_source"] == "recorded" and res.loc["A", "profile_flag"] == "ok"
    assert res.loc["B", "floor_source"] == "bathymetry" and res.loc["B", "profile_flag"] == "ok"
    assert res.loc["C", "profile_flag"] == "floor_unknown" and res.loc["C", "bottom_c"] == ""


def test_average_over_the_lowest_metres():
    depths = np.array([10.0, 80.0, 90.0, 96.0, 99.0])
    temps = np.array([2.0, 1.0, 0.8, 0.6, 0.3])
    res = bottom_values(_samples("A", depths, temps), _casts(["A"], [100.0]),
                        ProfileOptions(average_m=10.0)).casts.iloc[0]
    assert int(res["n_averaged"]) == 3  # 90, 96 and 99 m lie within 10 m of 99 m
    assert float(res["bottom_c"]) == pytest.approx((0.8 + 0.6 + 0.3) / 3, abs=5e-4)


def test_depth_from_pressure_against_the_teos10_check_value():
    # Source: TEOS-10 GSW check values (gsw_cv_v3_0, shipped with gsw): z_from_p at
    # p_chck_cast = 101 dbar, lat_chck_cast = 11 degN gives z = -100.40139855 m.
    assert depth_from_pressure(101.0, 11.0) == pytest.approx(100.40139855, abs=1e-6)
    # CF sea_water_pressure includes the atmosphere: one standard atmosphere less.
    assert depth_from_pressure(101.0 + ATMOSPHERE_DBAR, 11.0, includes_atmosphere=True) == \
        pytest.approx(100.40139855, abs=1e-6)
    assert ATMOSPHERE_DBAR == 10.1325  # Source: IOC et al. 2010, TEOS-10 manual: P0 = 101325 Pa


def test_spike_test_values():
    # Test value |V2 - (V3 + V1)/2| - |(V3 - V1)/2|: for 1, 9, 1.2 it is 7.9 - 0.1 = 7.8.
    # Source: Wong et al. 2020, Argo QC manual v3.3, test 9 (6 degC above 500 dbar, 2 below)
    v = np.array([1.0, 9.0, 1.2, 1.1, 4.2, 1.0])
    p = np.array([10.0, 20.0, 30.0, 600.0, 610.0, 620.0])
    flags = spike_test(v, p, 6.0, 2.0)
    assert flags.tolist() == [False, True, False, False, True, False]
    shallow = spike_test(v, np.full(6, 100.0), 6.0, 2.0)  # 3.1 degC spike under 6 degC
    assert shallow.tolist() == [False, True, False, False, False, False]
    assert not spike_test([1.0, 2.0], [1.0, 2.0], 6.0, 2.0).any()


def test_sample_checks_missing_implausible_non_monotonic_spike_and_upcast():
    s = pd.DataFrame({
        "cast": ["A"] * 8 + ["U"] * 3, "sample": list(range(8)) + list(range(3)),
        "temperature_c": [1.0, 1.0, 45.0, 1.0, 12.0, 0.9, 1.0, np.nan, 0.2, 0.5, 1.0],
        "depth_m": [5.0, 10.0, 15.0, 20.0, 25.0, 22.0, 30.0, 40.0, 90.0, 50.0, 5.0],
        "pressure_dbar": np.nan, "salinity": 34.0})
    out = quality_control_samples(s, pd.Series({"A": -62.0, "U": -62.0}), ProfileOptions())
    a = out[out["cast"] == "A"].set_index("sample")["sample_flag"]
    assert a.tolist() == ["ok", "ok", "implausible", "ok", "spike", "non_monotonic", "ok",
                          "missing"]
    u = out[out["cast"] == "U"]
    assert u["upcast"].all() and (u["sample_flag"] == "ok").all()
    # depth given: sea pressure filled in by TEOS-10 (about 1.0 dbar a metre)
    assert out["pressure_dbar"].to_numpy() == pytest.approx(out["depth_m"].to_numpy() * 1.0,
                                                            rel=0.02)


def test_below_freezing_at_the_bottom_sample():
    res = bottom_values(_samples("A", [5.0, 95.0], [0.0, -2.3], sal=34.0),
                        _casts(["A"], [100.0]), ProfileOptions()).casts.iloc[0]
    assert res["profile_flag"] == "below_freezing"


# -- readers: the four CF DSG layouts and the long table ---------------------------------

PROFILES = {  # cast: (depths [m], temperatures)
    "c1": ([5.0, 40.0, 88.0], [1.0, 0.5, 0.1]),
    "c2": ([5.0, 30.0, 60.0, 99.0], [1.2, 0.9, 0.6, 0.3]),
    "c3": ([5.0, 70.0], [0.8, -0.4]),
}
FLOORS = [90.0, 101.0, 75.0]


def _common(n: int) -> dict:
    return {
        "lat": (("profile",), np.array([-62.0, -62.5, -61.8]),
                {"standard_name": "latitude", "units": "degrees_north"}),
        "lon": (("profile",), np.array([179.0, -179.5, 178.2]),
                {"standard_name": "longitude", "units": "degrees_east"}),
        "time": (("profile",), pd.to_datetime(["2020-01-20", "2020-01-21", "2020-01-22"]),
                 {"standard_name": "time"}),
        "profile_id": (("profile",), np.array(list(PROFILES)), {"cf_role": "profile_id"}),
        "floor": (("profile",), np.array(FLOORS), {
            "standard_name": "sea_floor_depth_below_sea_surface", "units": "m"}),
    }


def _ragged(kind: str) -> xr.Dataset:
    depth = np.concatenate([v[0] for v in PROFILES.values()])
    temp = np.concatenate([v[1] for v in PROFILES.values()])
    counts = [len(v[0]) for v in PROFILES.values()]
    vars_ = _common(3)
    vars_["temp"] = (("obs",), temp, {"standard_name": "sea_water_temperature",
                                      "units": "degC"})
    vars_["depth"] = (("obs",), depth, {"standard_name": "depth", "units": "m",
                                        "positive": "down"})
    if kind == "contiguous":
        vars_["row_size"] = (("profile",), np.array(counts, "int32"),
                             {"sample_dimension": "obs"})
    else:  # indexed: shuffle the samples, keep each profile's order
        idx = np.repeat(np.arange(3), counts)
        order = np.argsort(np.r_[np.arange(counts[0]) * 3, np.arange(counts[1]) * 3 + 1,
                                 np.arange(counts[2]) * 3 + 2], kind="stable")
        vars_["temp"] = (("obs",), temp[order], vars_["temp"][2])
        vars_["depth"] = (("obs",), depth[order], vars_["depth"][2])
        vars_["profile_index"] = (("obs",), idx[order].astype("int32"),
                                  {"instance_dimension": "profile"})
    return xr.Dataset({k: v for k, v in vars_.items()}, attrs={"featureType": "profile",
                                                               "Conventions": "CF-1.8"})


def _multidim(kind: str) -> xr.Dataset:
    vars_ = _common(3)
    if kind == "orthogonal":  # one z axis for all profiles, missing where not sampled
        z = np.array(sorted({d for v in PROFILES.values() for d in v[0]}))
        t = np.full((3, len(z)), np.nan)
        for i, (d, tt) in enumerate(PROFILES.values()):
            t[i, np.searchsorted(z, d)] = tt
        vars_["temp"] = (("profile", "z"), t, {"standard_name": "sea_water_temperature",
                                               "units": "degC"})
        vars_["z"] = (("z",), z, {"standard_name": "depth", "units": "m", "positive": "down"})
    else:  # incomplete: per-profile pressure (atmosphere included), padded
        t = np.full((3, 4), np.nan)
        pr = np.full((3, 4), np.nan)
        for i, (d, tt) in enumerate(PROFILES.values()):
            t[i, :len(d)] = tt
            lat = [-62.0, -62.5, -61.8][i]
            import gsw
            pr[i, :len(d)] = gsw.p_from_z(-np.asarray(d), lat) + ATMOSPHERE_DBAR
        vars_["temp"] = (("profile", "z"), t, {"standard_name": "sea_water_temperature",
                                               "units": "degC"})
        vars_["pres"] = (("profile", "z"), pr, {"standard_name": "sea_water_pressure",
                                                "units": "dbar"})
    return xr.Dataset(vars_, attrs={"featureType": "profile", "Conventions": "CF-1.8"})


@pytest.mark.parametrize("layout", ["contiguous", "indexed", "orthogonal", "incomplete"])
def test_every_dsg_layout_gives_the_same_bottom_values(tmp_path: Path, layout: str):
    ds = _ragged(layout) if layout in ("contiguous", "indexed") else _multidim(layout)
    path = tmp_path / f"{layout}.nc"
    ds.to_netcdf(path)
    data = read_profiles(path)
    assert sorted(data.casts["cast"]) == sorted(PROFILES)
    res = bottom_values(data.samples, data.casts, ProfileOptions()).casts.set_index("cast")
    for (cast, (d, t)), floor in zip(PROFILES.items(), FLOORS, strict=True):
        assert float(res.loc[cast, "bottom_c"]) == pytest.approx(t[-1], abs=5e-4), layout
        assert float(res.loc[cast, "sample_depth_m"]) == pytest.approx(d[-1], abs=0.01)
        assert float(res.loc[cast, "depth_m"]) == floor
    assert data.vertical == ("pressure (atmosphere subtracted)" if layout == "incomplete"
                             else "depth")


def test_long_table_with_a_column_map_and_pressure(tmp_path: Path):
    path = tmp_path / "p.csv"
    rows = ["CastID,When,Lat,Lon,PRES,TEMP,Floor"]
    for cast, (d, t) in PROFILES.items():
        p = depth_to_p(np.asarray(d))
        rows += [f"{cast},2020-01-20,-62.0,179.0,{pp:.4f},{tt},{120.0}" for pp, tt in zip(p, t,
                                                                                     strict=True)]
    path.write_text("\n".join(rows) + "\n")
    mapping = {"cast": "CastID", "time": "When", "lat": "Lat", "lon": "Lon",
               "pressure_dbar": "PRES", "temperature_c": "TEMP", "bottom_depth_m": "Floor"}
    data = read_profiles(path, mapping)
    assert data.vertical == "sea pressure"
    res = bottom_values(data.samples, data.casts, ProfileOptions(max_gap_m=50)).casts
    assert float(res.set_index("cast").loc["c2", "sample_depth_m"]) == pytest.approx(99.0,
                                                                                     abs=0.01)


def depth_to_p(d: np.ndarray) -> np.ndarray:
    import gsw

    return np.asarray(gsw.p_from_z(-d, -62.0))


def test_long_table_refuses_a_cast_with_two_positions(tmp_path: Path):
    path = tmp_path / "p.csv"
    path.write_text("cast,time,lat,lon,depth_m,temperature_c\n"
                    "a,2020-01-20,-62.0,179.0,5,1.0\na,2020-01-20,-62.1,179.0,50,0.5\n")
    with pytest.raises(InputError, match="cast 'a' holds more than one lat"):
        read_profiles(path)


def test_dsg_without_temperature_is_refused(tmp_path: Path):
    ds = _ragged("contiguous")
    ds["temp"].attrs["standard_name"] = "sea_water_potential_temperature"
    ds.to_netcdf(tmp_path / "x.nc")
    with pytest.raises(InputError, match="sea_water_temperature"):
        read_profiles(tmp_path / "x.nc")


# -- the command line ----------------------------------------------------------------------

def test_check_with_profiles_writes_qc_and_casts(tmp_path: Path):
    from typer.testing import CliRunner

    from coldindex.cli import app
    from tests.conftest import SAMPLE

    out = tmp_path / "qc"
    result = CliRunner().invoke(app, ["check", "--profiles", str(SAMPLE / "profiles.nc"),
                                      "--bathymetry", str(SAMPLE / "bathymetry.nc"),
                                      "--domain", str(SAMPLE / "domain.geojson"),
                                      "--out", str(out), "--show", "0"])
    assert result.exit_code == 0, result.output
    qc = pd.read_csv(out / "qc.csv")
    made = pd.read_csv(out / "casts.csv", dtype=str)
    assert len(qc) == len(made)
    short = qc[qc["flag"] == "not_near_bottom"]
    assert len(short) > 0 and short["detail"].str.contains("above the floor").all()
    assert "not near bottom" in result.output


def test_check_refuses_both_a_casts_file_and_profiles(tmp_path: Path):
    from typer.testing import CliRunner

    from coldindex.cli import app
    from tests.conftest import SAMPLE

    result = CliRunner().invoke(app, ["check", str(SAMPLE / "casts.csv"), "--profiles",
                                      str(SAMPLE / "profiles.nc")])
    assert result.exit_code == 2
    assert "one of them, not both" in result.output
    assert "Traceback" not in result.output


def test_long_table_row_order_changes_nothing(tmp_path: Path):
    rng = np.random.default_rng(5)
    rows = []
    for cast, (d, t) in PROFILES.items():
        rows += [(cast, "2020-01-20", -62.0, 179.0, dd, tt, 100.0) for dd, tt in zip(d, t,
                                                                                 strict=True)]
    rows.append(("c1", "2020-01-20", -62.0, 179.0, 40.0, 0.7, 100.0))  # a repeated depth
    df = pd.DataFrame(rows, columns=["cast", "time", "lat", "lon", "depth_m", "temperature_c",
                                     "bottom_depth_m"])
    outs = []
    for k in range(3):
        path = tmp_path / f"p{k}.csv"
        df.iloc[rng.permutation(len(df))].to_csv(path, index=False)
        data = read_profiles(path)
        outs.append(bottom_values(data.samples, data.casts, ProfileOptions(max_gap_m=50)).casts)
    for other in outs[1:]:
        pd.testing.assert_frame_equal(outs[0], other)
    assert outs[0].set_index("cast").loc["c1", "flagged_samples"] == "non_monotonic 1"


def test_a_file_that_is_not_netcdf_is_refused(tmp_path: Path):
    bad = tmp_path / "p.nc"
    bad.write_bytes(b"CDF\x01 truncated")
    with pytest.raises(InputError, match="cannot be read as NetCDF"):
        read_profiles(bad)


def test_time_and_position_found_without_standard_names(tmp_path: Path):
    ds = _ragged("contiguous")
    for v in ("lat", "lon", "time"):
        ds[v].attrs.pop("standard_name")
    ds["time"].attrs["axis"] = "T"
    ds.to_netcdf(tmp_path / "x.nc")
    data = read_profiles(tmp_path / "x.nc")
    assert data.casts["lat"].tolist() == [-62.0, -62.5, -61.8]
    assert data.casts["time"].dt.day.tolist() == [20, 21, 22]


def test_update_takes_casts_or_profiles_not_both(tmp_path: Path):
    from coldindex.config import config_from_mapping
    from coldindex.errors import ConfigError
    from coldindex.release import run_update
    from tests.conftest import SAMPLE

    both = config_from_mapping({"inputs": {"casts": "casts.csv", "profiles": "profiles.nc"}},
                               base=SAMPLE)
    with pytest.raises(ConfigError, match="not both"):
        run_update(both, tmp_path / "out")
    neither = config_from_mapping({"inputs": {}}, base=SAMPLE)
    with pytest.raises(ConfigError, match="inputs.casts or inputs.profiles"):
        run_update(neither, tmp_path / "out")
    ice_twice = config_from_mapping({"inputs": {"casts": "casts.csv", "ice": "ice.csv",
                                                "ice_fields": ["ice_fields.nc"]}}, base=SAMPLE)
    with pytest.raises(ConfigError, match="inputs.ice and inputs.ice_fields"):
        run_update(ice_twice, tmp_path / "out")
    assert not (tmp_path / "out").exists()


def test_profile_settings_are_validated_with_their_key():
    from coldindex.errors import ConfigError

    with pytest.raises(ConfigError, match="profiles.max_gap_m"):
        ProfileOptions(max_gap_m=-1.0)
    with pytest.raises(ConfigError, match="profiles.average_m"):
        ProfileOptions(average_m=500.0)


def test_survey_year_given_per_cast_else_the_calendar_year():
    s = pd.concat([_samples("A", [5.0, 95.0], [1.0, 0.2]), _samples("B", [5.0, 95.0], [1.0, 0.2])])
    casts = _casts(["A", "B"], [100.0, 100.0])
    casts["time"] = pd.to_datetime(["2019-12-28", "2020-01-03"])
    casts["year"] = [2020.0, np.nan]  # a survey straddling the new year, labelled 2020
    res = bottom_values(s, casts, ProfileOptions()).casts
    assert res["year"].tolist() == ["2020", "2020"]
