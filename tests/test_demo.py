import json
from pathlib import Path

import pandas as pd
import pytest

from coldindex.demo import write_scenario
from tests.conftest import SAMPLE

FILES = ("casts.csv", "ice.csv", "trajectories.csv", "domain.geojson", "strata.geojson",
         "coldindex.toml", "bathymetry.nc", "profiles.nc", "ice_fields.nc", "coldindex-raw.toml")


def test_demo_inputs_are_reproducible_and_match_the_committed_sample(tmp_path: Path):
    write_scenario(tmp_path / "a")
    write_scenario(tmp_path / "b")
    for name in FILES:
        a = (tmp_path / "a" / name).read_bytes()
        assert a == (tmp_path / "b" / name).read_bytes(), name
        assert a == (SAMPLE / name).read_bytes(), (
            f"sample_inputs/{name} differs from the generator; regenerate with "
            "`python -m coldindex.demo sample_inputs`")


def test_demo_scenario_story():
    from coldindex.demo import FIRST_YEAR, LAST_YEAR, SHELF

    casts = pd.read_csv(SAMPLE / "casts.csv", dtype={"bottom_c": str})
    assert casts["year"].nunique() >= 30 and casts["year"].min() == FIRST_YEAR
    per_year = casts.groupby("year").size()
    assert per_year.median() > 150
    south = casts["lat"] < 0
    assert south.mean() > 0.99  # the southern hemisphere, one sign error planted
    planted_outside = casts["station"] == "T00-S00"
    assert planted_outside.sum() == 1
    assert casts.loc[south & ~planted_outside, "lat"].between(-64.0, -60.0).all()
    assert casts.loc[~south, "station"].nunique() == 1
    assert all(-64.0 <= lat <= -60.0 for _, lat in SHELF)
    lon = casts["lon"]
    assert (lon > 170).any() and (lon < -170).any()  # straddles 180 degrees
    assert casts["station"].str.fullmatch(r"T\d\d-S\d\d").all()
    dates = pd.to_datetime(casts["date"])
    assert set(dates.dt.month) <= {1, 2, 3}
    span = dates.groupby(casts["year"]).agg(lambda d: (d.max() - d.min()).days)
    assert span.median() >= 35  # about six weeks
    ice = pd.read_csv(SAMPLE / "ice.csv")
    assert set(range(5, 11)) <= set(ice["month"]) <= set(range(3, 13))
    assert ice["year"].max() == LAST_YEAR  # calendar years: the newest winter is complete
    traj = pd.read_csv(SAMPLE / "trajectories.csv")
    assert traj["model"].nunique() >= 3 and traj["scenario"].nunique() == 2
    assert traj["year"].max() == 2100
    cfg = (SAMPLE / "coldindex.toml").read_text()
    assert 'months = "5-10"' in cfg


@pytest.mark.slow
def test_demo_command_end_to_end(tmp_path: Path):
    from typer.testing import CliRunner

    from coldindex.cli import app

    result = CliRunner().invoke(app, ["demo", str(tmp_path / "d"), "--sims", "4", "--boot",
                                      "99"])
    assert result.exit_code == 0, result.output
    release = tmp_path / "d" / "release" / "release-1"
    assert (tmp_path / "d" / "release" / "latest").read_text().strip() == "release-1"
    for name in ("report.html", "covariates.csv", "projection.csv", "outlook.json"):
        assert (release / name).is_file()
    from coldindex.demo import LAST_YEAR, LOW_COVERAGE_YEAR, SCENARIOS, STEP_YEAR

    for scenario in SCENARIOS:
        assert f"Under scenario {scenario}" in result.output
    # The planted warm shift survives the red-noise test.
    shifts = pd.read_csv(release / "shifts.csv")
    assert ((shifts["year"] == STEP_YEAR) & (shifts["p_value"] < 0.1)).any()
    ind = pd.read_csv(release / "indices.csv")
    assert ind["year"].nunique() >= 30
    assert "coverage" in ind.set_index("year").loc[LOW_COVERAGE_YEAR, "note"]
    assert ind["below_2c_km2"].notna().sum() >= 30
    # Southern winter, January survey: the newest winter (May-October of the last survey's
    # year) forecasts the next January's survey, and lag 0 carries the planted skill.
    outlook = json.loads((release / "outlook.json").read_text())
    assert outlook["winter"] == LAST_YEAR + 1 and outlook["year"] == LAST_YEAR + 1
    skill = pd.read_csv(release / "skill.csv")
    lag0 = skill[(skill["lag"] == 0) & (skill["predictor"] == "ice_winter_mean")]
    assert lag0["r"].iloc[0] < -0.6 and lag0["q_value"].iloc[0] < 0.05


def test_demo_raw_sources_tell_the_same_story():
    from coldindex.config import IceFieldsOptions, ProfileOptions
    from coldindex.demo import STOPPED_SHORT
    from coldindex.io.readers import read_domain
    from coldindex.sources import ice_table, profile_casts

    assert sum(f.stat().st_size for f in SAMPLE.iterdir()) < 4_000_000  # a few MB at most
    made = profile_casts(SAMPLE / "profiles.nc", None, ProfileOptions(), None,
                         SAMPLE / "bathymetry.nc")
    casts = pd.read_csv(SAMPLE / "casts.csv", dtype=str)
    usable = pd.to_numeric(casts["bottom_c"], errors="coerce").between(-3, 30)
    keys = ["year", "station", "date"]
    assert set(map(tuple, made[keys].to_numpy())) == set(
        map(tuple, casts.loc[usable & (casts["station"] != "T00-S00"), keys].to_numpy()))
    ok = made[made["profile_flag"] == "ok"]
    first = casts[usable].drop_duplicates(keys)
    both = ok.merge(first, on=keys, suffixes=("", "_casts"))
    diff = (both["bottom_c"].astype(float) - both["bottom_c_casts"].astype(float)).abs()
    assert diff.max() < 0.01  # the profile's bottom sample is the cast's bottom value
    short = made[made["profile_flag"] == "not_near_bottom"]
    assert len(short) == STOPPED_SHORT and (short["gap_m"].astype(float) > 40).all()
    assert (made["floor_source"] == "bathymetry").sum() > 0
    assert (made["flagged_samples"] == "spike 1").sum() == 1
    ice = ice_table([SAMPLE / "ice_fields.nc"], {"domain": read_domain(SAMPLE / "domain.geojson")},
                    IceFieldsOptions()).table
    mass = ice[ice["quantity"] == "mass_gt"].merge(pd.read_csv(SAMPLE / "ice.csv"),
                                                   on=["year", "month"])
    assert len(mass) > 250 and mass["value"].corr(mass["ice"]) > 0.9
    assert 'profiles = "profiles.nc"' in (SAMPLE / "coldindex-raw.toml").read_text()


@pytest.mark.slow
def test_update_runs_from_profiles_and_ice_fields_alone(tmp_path: Path):
    from coldindex.io.files import load_config
    from coldindex.release import run_update

    cfg = load_config(SAMPLE / "coldindex-raw.toml")
    assert cfg.inputs.casts is None and cfg.inputs.ice is None
    cfg = cfg.replace(index=dict(sims=4, param_draws=2), shifts=dict(boot=99))
    run = run_update(cfg, tmp_path / "out", None)
    rel = run.release
    made = pd.read_csv(rel / "casts.csv", dtype=str)
    qc = pd.read_csv(rel / "qc.csv")
    assert (qc["flag"] == "not_near_bottom").sum() == (made["profile_flag"] ==
                                                       "not_near_bottom").sum() > 0
    ice = pd.read_csv(rel / "ice_fields.csv")
    assert set(ice["quantity"]) == {"area_km2", "extent_km2", "volume_km3", "mass_gt"}
    assert set(ice["region"]) == {"domain"}
    skill = pd.read_csv(rel / "skill.csv")
    lag0 = skill[(skill["lag"] == 0) & (skill["predictor"] == "ice_winter_mean")]
    assert lag0["r"].iloc[0] < -0.5
    prov = json.loads((rel / "provenance.json").read_text())
    assert "profiles" in prov["inputs_sha256"] and "ice_fields[0]" in prov["inputs_sha256"]
    assert "casts.csv" in prov["outputs_sha256"] and "ice_fields.csv" in prov["outputs_sha256"]
