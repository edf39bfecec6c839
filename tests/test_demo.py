import json
from pathlib import Path

import pandas as pd
import pytest

from coldindex.demo import write_scenario
from tests.conftest import SAMPLE

FILES = ("casts.csv", "ice.csv", "trajectories.csv", "domain.geojson", "coldindex.toml",
         "bathymetry.nc")


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
