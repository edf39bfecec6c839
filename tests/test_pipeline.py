import json
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

from coldindex.cli import app
from coldindex.covariates import covariates_table
from coldindex.errors import ConfigError, OutputError, StageError
from coldindex.io.files import load_config
from coldindex.io.writers import sha256_file
from coldindex.release import run_update
from coldindex.schema import CLASSES, EMERGENCE, SHIFTS, SKILL, indices_table
from tests.conftest import BOX_180, synthetic_casts

YEARS = tuple(range(2001, 2013))

CONFIG = """
[inputs]
casts = "casts.csv"
domain = "domain.geojson"
ice = "ice.csv"
trajectories = ["traj.csv"]

[index]
thresholds = [0.0, 1.0]
grid_km = 10.0
sims = 8
min_casts = 20

[classify]
columns = ["bottom_mean_c", "below_0c_km2"]

[shifts]
cutoff = 4
min_size = 3
boot = 19

[skill]
lags = "0-1"
leave_out = 1

[project]
adjust = "delta"
calibration = "2001-2012"  # 12 survey years: accepted explicitly (the guard wants 20)
short_calibration = true
window = 5

[covariates]
columns = ["bottom_mean_c", "below_0c_km2"]
lags = [1, 2]

[report]
map_years = 2
"""


def make_inputs(folder: Path) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    casts = synthetic_casts(years=YEARS, n_side=9)
    casts.to_csv(folder / "casts.csv", index=False)
    (folder / "domain.geojson").write_text(json.dumps(
        {"type": "Feature", "properties": {}, "geometry": BOX_180.__geo_interface__}))
    rng = np.random.default_rng(3)
    rows = []
    for y in range(2000, 2013):
        a = rng.normal()
        for m in (11, 12, 1, 2, 3, 4):
            cal = y if m >= 11 else y + 1
            rows.append((cal, m, round(5 + a + rng.normal(0, 0.1), 3)))
    pd.DataFrame(rows, columns=["year", "month", "ice"]).to_csv(folder / "ice.csv", index=False)
    years = np.arange(2001, 2061)
    traj = [(m, "s1", "r1", int(y), round(0.3 * k + 0.05 * (y - 2001) + rng.normal(0, 0.2), 3))
            for k, m in enumerate(("Alpha", "Beta")) for y in years]
    pd.DataFrame(traj, columns=["model", "scenario", "member", "year", "value"]).to_csv(
        folder / "traj.csv", index=False)
    (folder / "coldindex.toml").write_text(CONFIG)
    return folder / "coldindex.toml"


@pytest.fixture(scope="module")
def first_release(tmp_path_factory):
    base = tmp_path_factory.mktemp("update")
    cfg_path = make_inputs(base / "inputs")
    run = run_update(load_config(cfg_path), base / "out")
    return base, cfg_path, run


def test_every_output_present_with_documented_columns(first_release):
    base, _, run = first_release
    rel = run.release
    assert rel.name == "release-1"
    assert (base / "out" / "latest").read_text().strip() == "release-1"
    for name in ("indices.csv", "fields.nc", "qc.csv", "classes.csv", "cuts/bottom_mean_c.json",
                 "cuts/below_0c_km2.json", "shifts.csv", "regimes.csv", "skill.csv",
                 "hindcast.csv", "outlook.json", "projection.csv", "emergence.csv",
                 "covariates.csv", "revisions.csv", "report.html", "provenance.json",
                 "figures/series.png", "figures/maps.svg", "figures/projection.png"):
        assert (rel / name).is_file(), name
    assert list(pd.read_csv(rel / "indices.csv").columns) == indices_table([0.0, 1.0]).names
    assert list(pd.read_csv(rel / "shifts.csv").columns) == SHIFTS.names
    assert list(pd.read_csv(rel / "skill.csv").columns) == SKILL.names
    assert list(pd.read_csv(rel / "emergence.csv").columns) == EMERGENCE.names
    assert list(pd.read_csv(rel / "classes.csv").columns) == list(CLASSES.names)
    prov = json.loads((rel / "provenance.json").read_text())
    for name, digest in prov["outputs_sha256"].items():
        assert sha256_file(rel / name) == digest, name
    assert prov["inputs_sha256"]["casts"] == sha256_file(base / "inputs" / "casts.csv")
    assert set(prov["casts_sha256_by_year"]) == {str(y) for y in YEARS}
    assert run.headlines and any("Outlook" in h for h in run.headlines)


def test_report_is_self_contained(first_release):
    import base64
    import re
    from html.parser import HTMLParser

    _, _, run = first_release
    page = (run.release / "report.html").read_text()
    srcs: list[str] = []

    class P(HTMLParser):
        def handle_starttag(self, tag, attrs):
            a = dict(attrs)
            for key in ("src", "href"):
                if key in a:
                    srcs.append(a[key])

    P().feed(page)
    assert len(srcs) >= 4
    for s in [s for s in srcs if not s.startswith("#")]:  # "#..." links inside the page
        assert s.startswith("data:image/png;base64,"), s[:40]
        data = base64.b64decode(s.split(",", 1)[1], validate=True)
        assert data[:8] == b"\x89PNG\r\n\x1a\n"
    assert not re.search(r"https?://", page)
    assert "decision support" in page


def test_rerun_is_byte_identical(first_release, tmp_path: Path):
    base, cfg_path, run = first_release
    again = run_update(load_config(cfg_path), tmp_path / "other")
    files = sorted(p.relative_to(run.release) for p in run.release.rglob("*") if p.is_file())
    assert files == sorted(p.relative_to(again.release) for p in again.release.rglob("*")
                           if p.is_file())
    for f in files:
        a, b = (run.release / f).read_bytes(), (again.release / f).read_bytes()
        if f.name == "provenance.json":
            ja, jb = json.loads(a), json.loads(b)
            ja.pop("created_utc")
            jb.pop("created_utc")
            assert ja == jb
        else:
            assert a == b, f


def test_failure_leaves_no_release_and_previous_intact(first_release, monkeypatch):
    base, cfg_path, run = first_release
    out = base / "out"
    before = sorted(p.name for p in out.iterdir())
    digest = sha256_file(run.release / "indices.csv")

    def boom(*args, **kwargs):
        raise RuntimeError("injected failure in the report stage")

    monkeypatch.setattr("coldindex.report.summary.release_page", boom)
    with pytest.raises(StageError, match="The report stage of the update failed .*injected"):
        run_update(load_config(cfg_path), out)
    assert sorted(p.name for p in out.iterdir()) == before
    assert (out / "latest").read_text().strip() == "release-1"
    assert sha256_file(run.release / "indices.csv") == digest


def test_revision_of_a_past_cast_is_explained(first_release, tmp_path: Path):
    base, _, _ = first_release
    inputs = tmp_path / "inputs"
    shutil.copytree(base / "inputs", inputs)
    out = tmp_path / "out"
    cfg = load_config(inputs / "coldindex.toml")
    run_update(cfg, out)
    casts = pd.read_csv(inputs / "casts.csv")
    k = casts.index[casts["year"] == 2004][40]
    casts.loc[k, "bottom_c"] += 1.5
    casts.to_csv(inputs / "casts.csv", index=False)
    second = run_update(load_config(inputs / "coldindex.toml"), out)
    assert second.release.name == "release-2"
    rev = pd.read_csv(second.release / "revisions.csv")
    assert len(rev) > 0
    assert set(rev["year"]) == {2004}
    assert rev["cause"].str.contains("casts of 2004 changed").all()
    assert "bottom_mean_c" in set(rev["column"])


def test_config_errors(tmp_path: Path):
    cfg_path = make_inputs(tmp_path / "inputs")
    text = cfg_path.read_text().replace("boot = 19", "boot = 19\nbootz = 3")
    cfg_path.write_text(text)
    with pytest.raises(ConfigError, match="shifts.bootz is not a known key"):
        load_config(cfg_path)
    cfg_path.write_text(CONFIG.replace('"ice.csv"', '"nope.csv"'))
    with pytest.raises(ConfigError, match="inputs.ice names .*nope.csv"):
        run_update(load_config(cfg_path), tmp_path / "out")
    cfg_path.write_text(CONFIG.replace('"ice.csv"', '"latest"'))
    (tmp_path / "inputs" / "latest").write_text("release-1\n")
    with pytest.raises(OutputError, match="would overwrite the input"):
        run_update(load_config(cfg_path), tmp_path / "inputs")  # inputs may sit in --out
    assert sorted(p.name for p in (tmp_path / "inputs").iterdir()) == [
        "casts.csv", "coldindex.toml", "domain.geojson", "ice.csv", "latest", "traj.csv"]


def test_covariates_lags_align_by_year():
    ind = pd.DataFrame({"year": [2001, 2002, 2004], "x_c": [1.0, 2.0, 4.0]})
    cov = covariates_table(ind, ("x_c",), (1,), None).set_index("year")
    assert np.isnan(cov.loc[2001, "x_c_lag1"])
    assert cov.loc[2002, "x_c_lag1"] == 1.0
    assert np.isnan(cov.loc[2004, "x_c_lag1"])  # 2003 is missing: blank, not shifted
    assert cov.loc[2003].isna()["x_c"]


def test_init_and_update_cli(tmp_path: Path):
    runner = CliRunner()
    r = runner.invoke(app, ["init", str(tmp_path / "cfg")])
    assert r.exit_code == 0 and (tmp_path / "cfg" / "coldindex.toml").is_file()
    r = runner.invoke(app, ["init", str(tmp_path / "cfg")])
    assert r.exit_code == 3 and "already exists" in r.output
    r = runner.invoke(app, ["update", str(tmp_path / "cfg" / "coldindex.toml"), "--out",
                            str(tmp_path / "rel")])
    assert r.exit_code == 2 and "inputs.casts names" in r.output and "Traceback" not in r.output
    assert not (tmp_path / "rel").exists() or not any(
        p.name.startswith("release-") for p in (tmp_path / "rel").iterdir())


def test_incompatible_previous_release_is_refused(tmp_path: Path):
    cfg_path = make_inputs(tmp_path / "inputs")
    old = tmp_path / "old-release"
    old.mkdir()
    (old / "provenance.json").write_text(json.dumps({"version": "0.0.1", "release_format": 0}))
    with pytest.raises(Exception, match="incompatible release format"):
        run_update(load_config(cfg_path), tmp_path / "out", previous=old)
    assert not any((tmp_path / "out").glob("release-*"))
    with pytest.raises(Exception, match="not a coldindex release"):
        run_update(load_config(cfg_path), tmp_path / "out", previous=tmp_path)


def test_withdrawn_provisional_shift_is_listed_in_revisions(first_release, tmp_path: Path):
    # A previous release that reported a provisional STARS shift (within the last cut-off
    # length, 4 years) which the same inputs no longer show: written into a copy of the
    # first release, its checksum recorded as a release would.
    _, cfg_path, run = first_release
    prev = tmp_path / "previous"
    shutil.copytree(run.release, prev)
    sh = pd.read_csv(prev / "shifts.csv")
    year = next(y for y in (2011, 2010, 2012) if not ((sh["method"] == "stars")
                                                       & (sh["year"] == y)).any())
    row = {"method": "stars", "year": year, "mean_before": 1.0, "mean_after": 1.4,
           "t_stat": 2.0, "p_value": 0.3, "rsi": 0.1, "provisional": True}
    pd.concat([sh, pd.DataFrame([row])], ignore_index=True).to_csv(prev / "shifts.csv",
                                                                   index=False)
    prov = json.loads((prev / "provenance.json").read_text())
    prov["outputs_sha256"]["shifts.csv"] = sha256_file(prev / "shifts.csv")
    (prev / "provenance.json").write_text(json.dumps(prov))
    new = run_update(load_config(cfg_path), tmp_path / "out", previous=prev)
    rev = pd.read_csv(new.release / "revisions.csv")
    gone = rev[rev["cause"].str.startswith("provisional regime shift withdrawn")]
    assert gone["year"].tolist() == [year] and "STARS" in gone["cause"].iloc[0]
    assert gone["column"].tolist() == ["bottom_mean_c"]
    assert gone["previous"].iloc[0] == pytest.approx(0.4)
    assert gone["current"].isna().all()
    assert len(rev) == len(gone)  # same inputs: no value changed
    assert "No past value changed since the previous release." in new.headlines
    assert any("provisional regime shift(s) of the previous release withdrawn" in h
               for h in new.headlines)
