import json
from pathlib import Path

import numpy as np
import pandas as pd
from typer.testing import CliRunner

from coldindex.cli import app
from coldindex.schema import SHIFTS

runner = CliRunner()


def run(*args):
    result = runner.invoke(app, [str(a) for a in args])
    return result.exit_code, result.output + (result.stderr or "")


def series_file(tmp_path: Path, n: int = 40, gap: int | None = None, **extra) -> Path:
    rng = np.random.default_rng(1)
    years = np.arange(1981, 1981 + n)
    v = rng.normal(0, 0.3, n)
    v[n // 2:] += 2.0
    df = pd.DataFrame({"Yr": years, "bottom_mean_c": v.round(3),
                       "bottom_mean_c_sd": np.full(n, 0.2), **extra})
    if gap is not None:
        df.loc[gap, "bottom_mean_c"] = np.nan
    p = tmp_path / "series.csv"
    df.to_csv(p, index=False)
    return p


def test_classify_end_to_end_and_reuse(tmp_path: Path):
    p = series_file(tmp_path)
    out = tmp_path / "a"
    code, text = run("classify", p, "--value", "bottom_mean_c", "--out", out,
                     "--columns", "year=Yr", "--reference", "1981-2000")
    assert code == 0, text
    classes = pd.read_csv(out / "classes.csv")
    assert list(classes.columns) == ["year", "value", "class", "anomaly", "z", "p_cold",
                                     "p_average", "p_warm"]
    cuts = json.loads((out / "cuts.json").read_text())
    assert cuts["column"] == "bottom_mean_c" and cuts["reference"] == "1981-2000"
    assert cuts["direction"] == "lower"
    # Reusing the cuts gives the same classes.
    code, text = run("classify", p, "--value", "bottom_mean_c", "--out", tmp_path / "b",
                     "--columns", "year=Yr", "--cuts", out / "cuts.json")
    assert code == 0
    again = pd.read_csv(tmp_path / "b" / "classes.csv")
    assert list(again["class"]) == list(classes["class"])


def test_classify_refuses_cuts_for_another_column(tmp_path: Path):
    p = series_file(tmp_path)
    cuts = tmp_path / "cuts.json"
    cuts.write_text(json.dumps({"column": "below_2c_km2", "low": 1, "high": 2, "rule": "given",
                                "reference": None, "direction": "higher"}))
    code, text = run("classify", p, "--value", "bottom_mean_c", "--out", tmp_path / "o",
                     "--columns", "year=Yr", "--cuts", cuts)
    assert code == 2 and "not 'bottom_mean_c'" in text and "Traceback" not in text
    assert not (tmp_path / "o" / "classes.csv").exists()


def test_series_errors(tmp_path: Path):
    p = series_file(tmp_path)
    code, text = run("classify", p, "--value", "nope", "--out", tmp_path / "o",
                     "--columns", "year=Yr")
    assert code == 2 and "no column 'nope'" in text
    dup = tmp_path / "dup.csv"
    dup.write_text("year,x_c\n2001,1\n2001,2\n2002,3\n")
    code, text = run("shifts", dup, "--value", "x_c", "--out", tmp_path / "o")
    assert code == 2 and "appears more than once" in text
    short = tmp_path / "short.csv"
    short.write_text("year,x_c\n" + "".join(f"{2000 + i},{i % 3}\n" for i in range(12)))
    code, text = run("shifts", short, "--value", "x_c", "--out", tmp_path / "o",
                     "--method", "stars")
    assert code == 2 and "fewer than the 20 the shift test needs" in text
    assert "Traceback" not in text


def test_shifts_end_to_end(tmp_path: Path):
    p = series_file(tmp_path, gap=5)
    out = tmp_path / "s"
    code, text = run("shifts", p, "--value", "bottom_mean_c", "--out", out,
                     "--columns", "year=Yr", "--boot", "99")
    assert code == 0, text
    assert "1986" in text  # the gap is reported
    sh = pd.read_csv(out / "shifts.csv")
    assert list(sh.columns) == list(SHIFTS.names)
    assert set(sh["method"]) == {"stars", "pelt"}
    assert (sh.groupby("method")["year"].apply(lambda s: 2001 in set(s))).all()
    # The 2-SD step in 40 years survives at the default --p-max 0.05; none is provisional.
    assert (sh.loc[sh["year"] == 2001, "p_value"] < 0.05).all()
    assert not sh["provisional"].any()
    assert "survives when p < 0.05 (--p-max)" in " ".join(text.split())
    reg = pd.read_csv(out / "regimes.csv")
    for _, g in reg.groupby("method"):
        assert g["n"].sum() == 39


def test_project_refuses_a_short_calibration_unless_accepted(tmp_path: Path):
    rng = np.random.default_rng(6)
    obs = tmp_path / "obs.csv"
    oy = np.arange(1990, 2021)
    pd.DataFrame({"year": oy, "bottom_mean_c": rng.normal(0.5, 0.4, len(oy)).round(3)}).to_csv(
        obs, index=False)
    traj = tmp_path / "traj.csv"
    ty = np.arange(2012, 2101)  # overlap 2012-2020: 9 years
    pd.DataFrame({"model": "M", "scenario": "s", "year": ty,
                  "value": (0.3 + 0.02 * (ty - 2012) + rng.normal(0, 0.4, len(ty))).round(3)}
                 ).to_csv(traj, index=False)
    code, text = run("project", traj, "--observed", obs, "--value", "bottom_mean_c", "--out",
                     tmp_path / "a", "--units", "degC")
    text = " ".join(text.split())
    assert code == 2 and "overlap in 9 years (2012-2020)" in text
    assert "--short-calibration" in text and "Traceback" not in text
    assert not (tmp_path / "a" / "emergence.csv").exists()
    code, text = run("project", traj, "--observed", obs, "--value", "bottom_mean_c", "--out",
                     tmp_path / "b", "--units", "degC", "--short-calibration")
    assert code == 2 and "--short-calibration needs to be false unless the calibration" in (
        " ".join(text.split()))
    code, text = run("project", traj, "--observed", obs, "--value", "bottom_mean_c", "--out",
                     tmp_path / "c", "--units", "degC", "--calibration", "2012-2020",
                     "--short-calibration")
    assert code == 0, text
    assert "fewer than 20" in " ".join(text.split())
    em = pd.read_csv(tmp_path / "c" / "emergence.csv")
    assert em["short_calibration"].all() and (em["calibration_years"] == 9).all()


def _ice_and_target(tmp_path: Path, strength: float) -> tuple[Path, Path]:
    rng = np.random.default_rng(9)
    winters = np.arange(1980, 2021)
    ice = rng.gamma(4.0, 1.0, len(winters))
    rows = [(w - 1, m, round(ice[k] * (0.8 + 0.1 * (m - 5)), 3))
            for k, w in enumerate(winters) for m in range(5, 11)]  # May-Oct of Y -> winter Y+1
    ice_path = tmp_path / "ice.csv"
    pd.DataFrame(rows, columns=["year", "month", "ice"]).to_csv(ice_path, index=False)
    years = winters[1:]  # the survey of January Y follows winter Y; lag 1 = winter Y - 1
    t = strength * (ice[:-1] - ice.mean()) + rng.normal(0, 0.5, len(years))
    target = tmp_path / "target.csv"
    pd.DataFrame({"year": years, "bottom_mean_c": t.round(3)}).to_csv(target, index=False)
    return ice_path, target


def test_skill_outlook_picks_its_lag_or_falls_back_to_climatology(tmp_path: Path):
    ice, target = _ice_and_target(tmp_path, -0.6)
    args = ["skill", "--ice", ice, "--target", target, "--value", "bottom_mean_c", "--months",
            "5-10", "--survey-month", "1"]
    code, text = run(*args, "--out", tmp_path / "a")
    assert code == 0, text
    ol = json.loads((tmp_path / "a" / "outlook.json").read_text())
    assert ol["basis"] == "regression" and ol["lag"] == 1 and ol["lags_considered"] == [0, 1, 2]
    assert "(lag 1)" in " ".join(text.split())
    code, text = run(*args, "--out", tmp_path / "b", "--outlook-lag", "0")
    assert code == 0, text
    ol = json.loads((tmp_path / "b" / "outlook.json").read_text())
    assert ol["lag"] == 0 and ol["basis"] == "climatology" and ol["reason"]
    flat = " ".join(text.split())
    assert "the outlook is climatological" in flat and "persistence" in flat
    code, text = run(*args, "--out", tmp_path / "c", "--outlook-lag", "4")
    assert code == 2 and "--outlook-lag needs to be one of the lags 0-2" in " ".join(text.split())


def test_shifts_p_max_and_provisional_in_the_terminal(tmp_path: Path):
    rng = np.random.default_rng(4)
    v = rng.normal(0, 0.3, 40)
    v[34:] += 2.5  # a step six years before the end: provisional with --cutoff 10
    p = tmp_path / "late.csv"
    pd.DataFrame({"year": np.arange(1981, 2021), "x_c": v.round(3)}).to_csv(p, index=False)
    code, text = run("shifts", p, "--value", "x_c", "--out", tmp_path / "o", "--method",
                     "pelt", "--boot", "99", "--p-max", "0.2")
    assert code == 0, text
    sh = pd.read_csv(tmp_path / "o" / "shifts.csv")
    assert sh["year"].tolist() == [2015] and sh["provisional"].tolist() == [True]
    assert "survives when p < 0.2 (--p-max)" in " ".join(text.split())
    assert "Provisional:" in text
    code, text = run("shifts", p, "--value", "x_c", "--out", tmp_path / "o2", "--p-max", "1")
    assert code == 2 and "--p-max needs to be a value in (0, 1)" in text
