import json
from pathlib import Path

import numpy as np
import pandas as pd
from typer.testing import CliRunner

from coldindex.cli import app

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
    assert code == 2 and "twice the cut-off" in text and "Traceback" not in text


def test_shifts_end_to_end(tmp_path: Path):
    p = series_file(tmp_path, gap=5)
    out = tmp_path / "s"
    code, text = run("shifts", p, "--value", "bottom_mean_c", "--out", out,
                     "--columns", "year=Yr", "--boot", "99")
    assert code == 0, text
    assert "1986" in text  # the gap is reported
    sh = pd.read_csv(out / "shifts.csv")
    assert list(sh.columns) == ["method", "year", "mean_before", "mean_after", "p_value", "rsi"]
    assert set(sh["method"]) == {"stars", "pelt"}
    assert (sh.groupby("method")["year"].apply(lambda s: 2001 in set(s))).all()
    reg = pd.read_csv(out / "regimes.csv")
    for _, g in reg.groupby("method"):
        assert g["n"].sum() == 39
