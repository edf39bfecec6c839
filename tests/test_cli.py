import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from typer.testing import CliRunner

from coldindex.cli import app
from coldindex.io.writers import sha256_file
from tests.conftest import SAMPLE, synthetic_casts

runner = CliRunner()


def run(*args):
    result = runner.invoke(app, [str(a) for a in args])
    text = result.output + (result.stderr if result.stderr_bytes is not None else "")
    return result.exit_code, text


@pytest.mark.parametrize("cmd", [[], ["check"], ["index"], ["classify"], ["shifts"], ["skill"],
                                 ["project"], ["update"], ["init"], ["demo"]])
def test_help_everywhere(cmd):
    code, text = run(*cmd, "--help")
    assert code == 0 and "Usage" in text


def test_version():
    from coldindex import __version__

    code, text = run("--version")
    assert code == 0 and __version__ in text


def one_line_error(text: str) -> str:
    assert "Traceback" not in text
    lines = [ln for ln in text.strip().splitlines() if ln.strip()]
    assert lines[-1].startswith("Error:") or any(ln.startswith("Error:") for ln in lines)
    return " ".join(lines)


@pytest.mark.parametrize("content, message", [
    (None, "does not exist"),
    (b"", "is empty"),
    (b"year,lat,lon,bottom_c\n", "header but no data rows"),
    (b"year,lat,lon\n2001,60,179\n", "no column 'bottom_c'"),
    (b"year,lat,lon,bottom_c\n" + b"2001,179.5,60.5,1.0\n" * 5, "look swapped"),
    (b"\x89PNG\x00\x00binary", "not a text table"),
])
def test_bad_casts_files(tmp_path: Path, content, message):
    p = tmp_path / "casts.csv"
    if content is not None:
        p.write_bytes(content)
    out = tmp_path / "out"
    for cmd in (["check", p], ["index", p, "--out", out]):
        code, text = run(*cmd)
        assert code == 2
        joined = one_line_error(text)
        assert message in joined and "casts.csv" in joined
    assert not out.exists() or not any(out.iterdir())


def test_output_path_is_a_file(tmp_path: Path):
    casts = tmp_path / "casts.csv"
    synthetic_casts().to_csv(casts, index=False)
    target = tmp_path / "taken"
    target.write_text("x")
    code, text = run("index", casts, "--out", target)
    assert code == 3 and "is a file" in one_line_error(text)
    assert target.read_text() == "x"


def test_bad_option_values(tmp_path: Path):
    casts = tmp_path / "casts.csv"
    synthetic_casts().to_csv(casts, index=False)
    code, text = run("index", casts, "--out", tmp_path / "o", "--method", "spline")
    assert code == 2 and "--method needs to be one of kriging, idw" in one_line_error(text)
    code, text = run("index", casts, "--out", tmp_path / "o", "--thresholds", "cold")
    assert code == 2 and "Traceback" not in text


def test_check_reports_planted_faults_of_the_sample(tmp_path: Path):
    code, text = run("check", SAMPLE / "casts.csv", "--domain", SAMPLE / "domain.geojson",
                     "--out", tmp_path)
    assert code == 0, text
    qc = pd.read_csv(tmp_path / "qc.csv")
    flags = set(qc["flag"])
    for reason in ("missing", "sentinel", "duplicate_copy", "duplicate_conflict",
                   "outside_domain"):
        assert reason in flags
        assert reason in text
    # The latitude whose sign was lost lands in the other hemisphere, outside the domain.
    flipped = qc[qc["lat"] > 0]
    assert len(flipped) == 1 and flipped["flag"].iloc[0] == "outside_domain"
    flagged = qc[qc["flag"] != "ok"]
    for row in flagged["row"]:
        assert str(row) in text


def test_check_with_column_mapping(tmp_path: Path):
    df = synthetic_casts().rename(columns={"year": "Yr", "bottom_c": "TempBottom"})
    p = tmp_path / "theirs.csv"
    df.to_csv(p, index=False, sep=";")
    code, text = run("check", p, "--columns", "year=Yr,bottom_c=TempBottom")
    assert code == 0, text


def test_index_end_to_end(tmp_path: Path):
    casts = tmp_path / "casts.csv"
    synthetic_casts(years=(2001, 2002, 2003), n_side=9).to_csv(casts, index=False)
    out = tmp_path / "out"
    code, text = run("index", casts, "--out", out, "--grid-km", "10", "--sims", "20",
                     "--min-casts", "20", "--thresholds", "0,1.5")
    assert code == 0, text
    names = {p.name for p in out.iterdir()}
    assert {"indices.csv", "fields.nc", "qc.csv", "provenance.json", "domain.geojson",
            "frozen.json"} <= names
    assert not [n for n in names if n.endswith(".tmp")]
    ind = pd.read_csv(out / "indices.csv")
    assert list(ind["year"]) == [2001, 2002, 2003]
    assert {"below_0c_km2", "below_1p5c_km2_map", "below_1p5c_km2_hi90"} <= set(ind.columns)
    assert (ind["below_0c_km2"] <= ind["below_1p5c_km2"]).all()
    with xr.open_dataset(out / "fields.nc") as ds:
        assert ds.attrs["Conventions"] == "CF-1.8"
        assert ds["albers_conical_equal_area"].attrs["grid_mapping_name"] == \
            "albers_conical_equal_area"
        assert ds["bottom_temperature"].dims == ("year", "y", "x")
        assert ds["bottom_temperature"].attrs["cell_measures"] == "area: cell_area"
        assert ds["cell_area"].attrs["units"] == "m2"
        assert "p_below_1p5c" in ds
        assert ds["lat"].ndim == 2
        assert int(ds["n_casts"].sum()) == len(ds["cast"])
        np.testing.assert_allclose(np.nanmean(ds["bottom_temperature"].values, axis=(1, 2)),
                                   ind["bottom_mean_c"], atol=0.05)
    prov = json.loads((out / "provenance.json").read_text())
    assert prov["inputs"]["casts"]["sha256"] == sha256_file(casts)
    assert set(prov["casts_sha256_by_year"]) == {"2001", "2002", "2003"}
    for name, digest in prov["outputs"].items():
        assert sha256_file(out / name) == digest
    frozen = json.loads((out / "frozen.json").read_text())
    assert frozen["variogram_family"] in ("exponential", "spherical", "matern", "gaussian")
    # Second run: the derived domain and the family are reused, values unchanged.
    code, text = run("index", casts, "--out", out, "--grid-km", "10", "--sims", "20",
                     "--min-casts", "20", "--thresholds", "0,1.5")
    assert code == 0 and "reused" in text and "frozen" in text
    pd.testing.assert_frame_equal(pd.read_csv(out / "indices.csv"), ind)
