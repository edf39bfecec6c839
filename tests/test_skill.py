from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

from coldindex.classify import cuts_by_rule
from coldindex.cli import app
from coldindex.errors import InputError, TooFewDataError
from coldindex.io.readers import read_ice
from coldindex.skill import (
    hindcast,
    ice_frame,
    outlook,
    parse_months,
    skill_table,
    winter_predictors,
)
from tests.conftest import SAMPLE


def raw_ice(rows):
    df = pd.DataFrame(rows, columns=["year", "month", "ice"]).astype(str)
    df.insert(0, "row", np.arange(1, len(df) + 1))
    return df


def test_winter_labelled_by_following_summer():
    # Common practice, no single source (and the guide's contract): with a winter starting in
    # November, November and December of year Y belong to winter Y + 1.
    ice = ice_frame(raw_ice([(2000, 11, 1.0), (2000, 12, 2.0), (2001, 1, 3.0),
                             (2001, 2, 4.0)]))
    P = winter_predictors(ice, parse_months("11-2"))
    assert list(P.index) == [2001]
    assert P.loc[2001, "ice_nov"] == 1.0 and P.loc[2001, "ice_winter_mean"] == 2.5
    assert parse_months("11-4") == [11, 12, 1, 2, 3, 4]
    assert winter_predictors(ice, [1, 2], "max").loc[2001, "ice_winter_max"] == 4.0


@pytest.mark.parametrize("rows, message", [
    ([(2000, 13, 1.0)], "outside 1..12"),
    ([(2000, 1, -1.0)], "negative ice"),
    ([(2000, 1, 1.0), (2000, 1, 2.0)], "more than once"),
    ([(2000, "jan", 1.0)], "needs a whole number"),
])
def test_ice_validation(rows, message):
    with pytest.raises(InputError, match=message):
        ice_frame(raw_ice(rows), "ice.csv")


@pytest.fixture(scope="module")
def sample():
    ice = ice_frame(read_ice(SAMPLE / "ice.csv"))
    P = winter_predictors(ice, parse_months("11-4"))
    # Target: the demo's planted story, by construction cold after heavy ice. Use the
    # generator's own winter anomaly so the test does not need the whole index run.
    from coldindex.demo import make_scenario

    sc = make_scenario()
    years = np.arange(1982, 2026)
    rng = np.random.default_rng(0)
    t = pd.Series([-0.8 * sc.winter_anomaly[int(y)] + rng.normal(0, 0.3) for y in years],
                  index=years)
    return P, t


def test_planted_ice_carries_skill_and_shuffled_ice_does_not(sample):
    P, t = sample
    tab = skill_table(P, t, [0, 1, 2])
    lag0 = tab[tab["lag"] == 0]
    assert (lag0["r"] < -0.6).all()
    assert lag0["q_value"].min() < 0.05
    rng = np.random.default_rng(1)
    shuffled = P.iloc[rng.permutation(len(P))].set_axis(P.index)
    tab_s = skill_table(shuffled, t, [0, 1, 2])
    assert tab_s["q_value"].min() > 0.1


def test_hindcast_uses_no_information_from_the_left_out_year(sample):
    P, t = sample
    base = hindcast(P, t, lag=0, leave_out=3)
    year = 2000
    moved = t.copy()
    moved[year] += 10.0
    again = hindcast(P, moved, lag=0, leave_out=3)
    b = base.table.set_index("year")
    a = again.table.set_index("year")
    assert a.loc[year, "predicted"] == pytest.approx(b.loc[year, "predicted"], abs=1e-12)
    assert a.loc[year + 3, "predicted"] != pytest.approx(b.loc[year + 3, "predicted"])
    assert base.msss_climatology > 0.3


def test_outlook_probabilities_and_observed_summer(sample):
    P, t = sample
    hc = hindcast(P, t, lag=0, leave_out=1)
    c = cuts_by_rule(t.index, t.to_numpy(), "bottom_mean_c")
    o = outlook(P, t, hc, c)
    assert o["p_cold"] + o["p_average"] + o["p_warm"] == pytest.approx(1.0)
    assert o["lo"] < o["predicted"] < o["hi"]
    assert o["year"] == 2026 and "observed" not in o  # the newest winter's March is known
    o2 = outlook(P.loc[:2025], t, hc, c)
    assert o2["year"] == 2025 and "observed" in o2


def test_too_few_common_years(sample):
    P, t = sample
    with pytest.raises(TooFewDataError, match="at least 10"):
        hindcast(P, t.loc[:1986], lag=0)


def test_skill_cli_end_to_end(tmp_path: Path, sample):
    _, t = sample
    target = tmp_path / "target.csv"
    pd.DataFrame({"Year": t.index, "bottom_mean_c": t.to_numpy()}).to_csv(target, index=False)
    result = CliRunner().invoke(app, ["skill", "--ice", str(SAMPLE / "ice.csv"), "--target",
                                      str(target), "--value", "bottom_mean_c", "--out",
                                      str(tmp_path / "o"), "--target-columns", "year=Year"])
    assert result.exit_code == 0, result.output
    assert "Outlook: From the" in result.output and "P(cold)" in result.output
    sk = pd.read_csv(tmp_path / "o" / "skill.csv")
    assert list(sk.columns) == ["predictor", "lag", "n", "n_eff", "r", "r_lo", "r_hi",
                                "confidence", "p_value", "q_value", "r_persistence",
                                "p_beats_persistence"]
    assert len(sk) == 7 * 3
    hc = pd.read_csv(tmp_path / "o" / "hindcast.csv")
    assert list(hc.columns) == ["year", "observed", "predicted", "persistence"]
    for name in ("outlook.json", "skill.png", "hindcast.png"):
        assert (tmp_path / "o" / name).stat().st_size > 0


def test_skill_cli_bad_ice(tmp_path: Path):
    bad = tmp_path / "ice.csv"
    bad.write_text("year,month,ice\n2000,1,1\n2000,1,2\n")
    target = tmp_path / "t.csv"
    target.write_text("year,bottom_mean_c\n2000,1\n")
    result = CliRunner().invoke(app, ["skill", "--ice", str(bad), "--target", str(target),
                                      "--value", "bottom_mean_c", "--out", str(tmp_path / "o")])
    assert result.exit_code == 2
    assert "more than once" in result.output and "Traceback" not in result.output
    assert not (tmp_path / "o" / "skill.csv").exists()
