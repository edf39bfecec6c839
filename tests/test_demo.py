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
    casts = pd.read_csv(SAMPLE / "casts.csv")
    assert casts["year"].nunique() >= 40
    per_year = casts.groupby("year").size()
    assert per_year.median() > 200
    lon = casts["lon"]
    assert (lon > 170).any() and (lon < -170).any()  # straddles 180 degrees
    ice = pd.read_csv(SAMPLE / "ice.csv")
    assert set(ice["month"]) == {11, 12, 1, 2, 3, 4, 5}
    traj = pd.read_csv(SAMPLE / "trajectories.csv")
    assert traj["model"].nunique() >= 3 and traj["scenario"].nunique() == 2
    assert traj["year"].max() == 2100


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
    assert "Under scenario high" in result.output
    # The planted 2002 warm shift survives the red-noise test.
    shifts = pd.read_csv(release / "shifts.csv")
    assert ((shifts["year"] == 2002) & (shifts["p_value"] < 0.1)).any()
    ind = pd.read_csv(release / "indices.csv")
    assert ind["year"].nunique() >= 40
    note_1987 = ind.set_index("year").loc[1987, "note"]
    assert "coverage" in note_1987
    assert ind["below_2c_km2"].notna().sum() >= 40
