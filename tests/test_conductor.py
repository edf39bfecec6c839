"""One conductor: a stage's files are the same from its command and from the update;
short records skip stages instead of failing; bad settings are refused before any work;
the init template runs as written; releases do not depend on how a path is spelled."""

import json
from pathlib import Path

import pandas as pd
import pytest
from typer.testing import CliRunner

from coldindex.cli import app
from coldindex.config import template
from tests.conftest import SAMPLE

SMALL = {"index": {"sims": 4, "param_draws": 2, "grid_km": 10.0},
         "shifts": {"boot": 49}, "skill": {"months": "5-10"}}
INPUTS = {"domain": str(SAMPLE / "domain.geojson"), "bathymetry": str(SAMPLE / "bathymetry.nc"),
          "ice": str(SAMPLE / "ice.csv"), "trajectories": [str(SAMPLE / "trajectories.csv")]}


def run(*args: object) -> tuple[int, str]:
    res = CliRunner().invoke(app, [str(a) for a in args])
    return res.exit_code, res.output


def _config(folder: Path, casts: Path, settings: dict = SMALL) -> Path:
    cfg = folder / "coldindex.toml"
    cfg.write_text(template(str(casts), INPUTS, settings))
    return cfg


@pytest.fixture(scope="module")
def release(tmp_path_factory) -> Path:
    d = tmp_path_factory.mktemp("conductor")
    cfg = _config(d, SAMPLE / "casts.csv")
    code, text = run("update", cfg, "--out", d / "out", "--workers", 1)
    assert code == 0, text
    return d / "out" / "release-1"


def _same_bytes(a: Path, b: Path) -> None:
    assert a.read_bytes() == b.read_bytes(), f"{a} differs from {b}"


def test_index_command_equals_the_update(release: Path, tmp_path: Path):
    code, text = run("index", SAMPLE / "casts.csv", "--out", tmp_path, "--domain",
                     SAMPLE / "domain.geojson", "--bathymetry", SAMPLE / "bathymetry.nc",
                     "--sims", 4, "--param-draws", 2, "--grid-km", 10, "--workers", 1)
    assert code == 0, text
    for name in ("indices.csv", "qc.csv", "frozen.json", "domain.geojson"):
        _same_bytes(tmp_path / name, release / name)


def test_classify_command_equals_the_update(release: Path, tmp_path: Path):
    classes = pd.read_csv(release / "classes.csv")
    for col in ("bottom_mean_c", "below_2c_km2"):
        out = tmp_path / col
        code, text = run("classify", release / "indices.csv", "--value", col, "--out", out)
        assert code == 0, text
        mine = classes[classes["column"] == col].drop(columns="column").reset_index(drop=True)
        pd.testing.assert_frame_equal(pd.read_csv(out / "classes.csv"), mine)
        assert json.loads((out / "cuts.json").read_text()) == json.loads(
            (release / "cuts" / f"{col}.json").read_text())


def test_shifts_command_equals_the_update(release: Path, tmp_path: Path):
    code, text = run("shifts", release / "indices.csv", "--value", "bottom_mean_c", "--boot", 49,
                     "--out", tmp_path)
    assert code == 0, text
    for name in ("shifts.csv", "regimes.csv"):
        _same_bytes(tmp_path / name, release / name)


def test_skill_command_equals_the_update(release: Path, tmp_path: Path):
    code, text = run("skill", "--ice", SAMPLE / "ice.csv", "--target", release / "indices.csv",
                     "--value", "bottom_mean_c", "--months", "5-10", "--cuts",
                     release / "cuts" / "bottom_mean_c.json", "--out", tmp_path)
    assert code == 0, text
    for name in ("skill.csv", "hindcast.csv", "outlook.json"):
        _same_bytes(tmp_path / name, release / name)


def test_project_command_equals_the_update(release: Path, tmp_path: Path):
    code, text = run("project", SAMPLE / "trajectories.csv", "--observed",
                     release / "indices.csv", "--value", "bottom_mean_c", "--cuts",
                     release / "cuts" / "bottom_mean_c.json", "--out", tmp_path)
    assert code == 0, text
    for name in ("projection.csv", "emergence.csv"):
        _same_bytes(tmp_path / name, release / name)


def _short_casts(folder: Path, years: int) -> Path:
    casts = pd.read_csv(SAMPLE / "casts.csv", dtype=str)
    last = sorted(casts["year"].unique())[-years:]
    path = folder / "casts.csv"
    casts[casts["year"].isin(last)].to_csv(path, index=False)
    return path


def test_a_three_year_survey_gets_a_release_with_the_skipped_stages_explained(tmp_path: Path):
    cfg = _config(tmp_path, _short_casts(tmp_path, 3))
    code, text = run("update", cfg, "--out", tmp_path / "out", "--workers", 1)
    assert code == 0, text
    rel = tmp_path / "out" / "release-1"
    prov = json.loads((rel / "provenance.json").read_text())
    assert set(prov["skipped"]) == {"shifts", "skill", "project"}
    assert "fewer than the 20 the shift test needs" in prov["skipped"]["shifts"]
    assert "hindcast" in prov["skipped"]["skill"]
    assert "calibration" in prov["skipped"]["project"]
    assert len(pd.read_csv(rel / "indices.csv")) == 3 and (rel / "classes.csv").is_file()
    assert not (rel / "shifts.csv").exists()
    page = (rel / "report.html").read_text()
    assert "Stages not run this year" in page and "shift test needs" in page
    assert "shifts skipped:" in " ".join(text.split())


def test_a_config_typo_is_refused_before_any_work_naming_its_key(tmp_path: Path):
    cfg = _config(tmp_path, SAMPLE / "casts.csv", {"skill": {"lags": "zero to two"}})
    code, text = run("update", cfg, "--out", tmp_path / "out")
    assert code == 2 and "skill.lags needs to be" in text and "'zero to two'" in text
    assert "--lags" not in text and not (tmp_path / "out").exists()
    code, text = run("skill", "--ice", SAMPLE / "ice.csv", "--target", SAMPLE / "casts.csv",
                     "--value", "bottom_mean_c", "--lags", "zero to two", "--out", tmp_path / "o")
    assert code == 2 and "--lags needs to be" in text and not (tmp_path / "o").exists()
    cfg.write_text(template(str(SAMPLE / "casts.csv"), {"domain": "nowhere.geojson"}))
    code, text = run("update", cfg, "--out", tmp_path / "out", "--check")
    assert code == 2 and "inputs.domain names" in text


def test_update_check_says_what_would_run_and_writes_nothing(tmp_path: Path):
    cfg = _config(tmp_path, SAMPLE / "casts.csv")
    code, text = run("update", cfg, "--out", tmp_path / "out", "--check")
    assert code == 0 and "valid" in text and "project:" in text
    assert not (tmp_path / "out").exists()


@pytest.mark.slow
def test_the_init_template_runs_as_written_on_a_casts_file(tmp_path: Path):
    code, text = run("init", tmp_path)
    assert code == 0, text
    _short_casts(tmp_path, 6)
    code, text = run("update", tmp_path / "coldindex.toml", "--out", tmp_path / "out",
                     "--check")
    assert code == 0, text
    code, text = run("update", tmp_path / "coldindex.toml", "--out", tmp_path / "out")
    assert code == 0, text
    assert (tmp_path / "out" / "release-1" / "report.html").is_file()


def test_releases_do_not_depend_on_how_the_config_path_is_spelled(tmp_path: Path,
                                                                   monkeypatch):
    cfg = _config(tmp_path, _short_casts(tmp_path, 3).name)  # relative inside the config
    monkeypatch.chdir(tmp_path)
    assert run("update", "coldindex.toml", "--out", "a", "--workers", 1)[0] == 0
    assert run("update", cfg, "--out", tmp_path / "b", "--workers", 1)[0] == 0
    a, b = tmp_path / "a" / "release-1", tmp_path / "b" / "release-1"
    names = sorted(p.relative_to(a) for p in a.rglob("*") if p.is_file())
    assert names == sorted(p.relative_to(b) for p in b.rglob("*") if p.is_file())
    for name in names:
        if name.name != "provenance.json":
            _same_bytes(a / name, b / name)
    pa, pb = (json.loads((r / "provenance.json").read_text()) for r in (a, b))
    pa.pop("created_utc"), pb.pop("created_utc")
    assert pa == pb and pa["config"]["inputs"]["casts"] == "casts.csv"
    assert str(tmp_path) not in (a / "frozen.json").read_text()
