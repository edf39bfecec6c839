from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

from coldindex.classify import cuts_by_rule
from coldindex.cli import app
from coldindex.config import parse_months
from coldindex.errors import InputError, TooFewDataError
from coldindex.io.readers import read_ice
from coldindex.skill import (
    hindcast,
    ice_frame,
    outlook,
    outlook_sentence,
    skill_and_outlook,
    skill_table,
    survey_month,
    winter_labels,
    winter_predictors,
)
from tests.conftest import SAMPLE


def raw_ice(rows):
    df = pd.DataFrame(rows, columns=["year", "month", "ice"]).astype(str)
    df.insert(0, "row", np.arange(1, len(df) + 1))
    return df


def test_winter_label_northern_july_survey():
    # The guide's contract (a winter is labelled with the year of the first survey that
    # starts after its last month): with a July survey and winter months 11-4, November and
    # December of year Y belong to winter Y + 1, which lag 0 pairs with the survey of July Y+1.
    ice = ice_frame(raw_ice([(2000, 11, 1.0), (2000, 12, 2.0), (2001, 1, 3.0),
                             (2001, 2, 4.0)]))
    P = winter_predictors(ice, parse_months("11-2"), survey=7)
    assert list(P.index) == [2001]
    assert P.loc[2001, "ice_nov"] == 1.0 and P.loc[2001, "ice_winter_mean"] == 2.5
    assert parse_months("11-4") == [11, 12, 1, 2, 3, 4]
    assert winter_predictors(ice, [1, 2], "max", survey=7).loc[2001, "ice_winter_max"] == 4.0
    assert winter_labels([2000, 2000, 2001], [11, 12, 4], parse_months("11-4"), 7).tolist() == [
        2001, 2001, 2001]


def test_winter_label_southern_january_survey():
    # The same contract with a January survey and winter months 5-10: May to October of year
    # Y belong to winter Y + 1 (the survey of January Y + 1), not to winter Y.
    rows = [(y, m, float(10 * (y - 2000) + m)) for y in (2000, 2001) for m in range(5, 11)]
    P = winter_predictors(ice_frame(raw_ice(rows)), parse_months("5-10"), survey=1)
    assert list(P.index) == [2001, 2002]
    assert P.loc[2001, "ice_may"] == 5.0 and P.loc[2002, "ice_oct"] == 20.0
    assert winter_labels([2000, 2000], [5, 10], parse_months("5-10"), 1).tolist() == [2001, 2001]
    # A survey later in the same calendar year (December) follows that winter directly.
    assert winter_labels([2000], [10], parse_months("5-10"), 12).tolist() == [2000]


def test_survey_month_given_or_from_median_survey_day():
    assert survey_month(7) == 7
    assert survey_month(None, [30.0, 40.0, np.nan]) == 2  # day 35 is 4 February
    assert survey_month(0, [182.0, 190.0]) == 7
    assert survey_month(None, [365.0]) == 12
    with pytest.raises(InputError, match="skill.survey_month"):
        survey_month(13)
    with pytest.raises(InputError, match="no median_doy"):
        survey_month(None, [np.nan])
    with pytest.raises(InputError, match="inside the winter months"):
        winter_labels([2000], [1], parse_months("11-4"), 2)


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
    P = winter_predictors(ice, parse_months("5-10"), survey=1)
    # Target: the demo's planted story, by construction cold after heavy ice. Use the
    # generator's own winter anomaly so the test does not need the whole index run.
    from coldindex.demo import FIRST_YEAR, LAST_YEAR, make_scenario

    sc = make_scenario()
    years = np.arange(FIRST_YEAR, LAST_YEAR + 1)
    rng = np.random.default_rng(0)
    t = pd.Series([-0.8 * sc.winter_anomaly[int(y)] + rng.normal(0, 0.3) for y in years],
                  index=years)
    return P, t


def test_demo_pairs_southern_winter_with_the_next_january_survey():
    # By construction (coldindex.demo), the ice of May-October of calendar year Y is scaled
    # by the anomaly that drives the survey of January Y + 1. The sample's ice file keeps
    # calendar years; the labelling must pair them with the next survey.
    from coldindex.demo import FIRST_YEAR, LAST_YEAR, make_scenario

    anomaly = pd.Series(make_scenario().winter_anomaly)
    ice = ice_frame(read_ice(SAMPLE / "ice.csv"))
    assert ice["year"].max() == LAST_YEAR  # calendar years, the newest winter complete
    P = winter_predictors(ice, parse_months("5-10"), survey=1)
    assert P.index.min() == FIRST_YEAR and P.index.max() == LAST_YEAR + 1
    both = pd.DataFrame({"ice": P["ice_winter_mean"], "anomaly": anomaly}).dropna()
    assert both.corr().iloc[0, 1] > 0.98
    # Labelling the winter by its own calendar year (a northern-summer habit) misses by one.
    wrong = P["ice_winter_mean"].set_axis(P.index - 1)
    off = pd.DataFrame({"ice": wrong, "anomaly": anomaly}).dropna()
    assert off.corr().iloc[0, 1] < 0.8


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
    base = hindcast(P, t, lags=0, leave_out=3)
    year = 2000
    moved = t.copy()
    moved[year] += 10.0
    again = hindcast(P, moved, lags=0, leave_out=3)
    b = base.table.set_index("year")
    a = again.table.set_index("year")
    assert a.loc[year, "predicted"] == pytest.approx(b.loc[year, "predicted"], abs=1e-12)
    assert a.loc[year + 3, "predicted"] != pytest.approx(b.loc[year + 3, "predicted"])
    assert base.msss_climatology > 0.3


def test_outlook_probabilities_and_observed_summer(sample):
    P, t = sample
    hc = hindcast(P, t, lags=0, leave_out=1)
    c = cuts_by_rule(t.index, t.to_numpy(), "bottom_mean_c")
    o = outlook(P, t, hc, c)
    assert o["p_cold"] + o["p_average"] + o["p_warm"] == pytest.approx(1.0)
    assert o["lo"] < o["predicted"] < o["hi"]
    last = int(t.index.max())
    # The newest winter (May-October of the last survey's year) is complete: its outlook is
    # for the coming January's survey, not yet observed.
    assert o["year"] == last + 1 and o["winter"] == last + 1 and "observed" not in o
    o2 = outlook(P.loc[:last], t, hc, c)
    assert o2["year"] == last and "observed" in o2


def _synthetic(seed, strength, n_years=40):
    """Ice predictors (AR(1) 0.5, 3 months and their mean) and a target that follows the
    winter mean of the year before (lag 1) with the given strength; 0 = no skill."""
    rng = np.random.default_rng(seed)
    winters = np.arange(1980, 1980 + n_years + 1)
    e = np.empty((3, len(winters)))
    e[:, 0] = rng.normal(size=3)
    for k in range(1, len(winters)):
        e[:, k] = 0.5 * e[:, k - 1] + np.sqrt(0.75) * rng.normal(size=3)
    P = pd.DataFrame({"ice_may": e[0], "ice_jun": e[1], "ice_jul": e[2]}, index=winters)
    P["ice_winter_mean"] = P.mean(axis=1)
    years = winters[1:]  # targets 1981 .. ; the newest winter is not yet followed
    t = pd.Series(strength * P["ice_winter_mean"].reindex(years - 1).to_numpy()
                  + rng.normal(0, 0.3, len(years)), index=years)
    return P, t


def test_hindcast_and_outlook_use_the_lag_that_has_skill():
    # Truth by construction: the target follows last winter's ice (lag 1) and nothing else.
    P, t = _synthetic(3, -0.9)
    c = cuts_by_rule(t.index, t.to_numpy(), "bottom_mean_c")
    table, hc, o = skill_and_outlook(P, t, [0, 1, 2], c, leave_out=3)
    best = table.sort_values("q_value").iloc[0]
    assert best["lag"] == 1
    assert hc.lag == 1 and (hc.table["lag"] == 1).mean() > 0.9
    assert hc.lags == (0, 1, 2) and hc.msss_climatology > 0.5
    assert o["basis"] == "regression" and o["reason"] == ""
    assert o["lag"] == 1 and o["predictor"] == "ice_winter_mean"
    # The outlook speaks for the first survey after the newest winter, from the winter before.
    newest = int(P.index.max())
    assert o["year"] == newest and o["winter"] == newest - 1
    # A first-lag-only hindcast (the old behaviour) keeps only what the ice's own
    # persistence carries over from lag 1.
    assert hindcast(P, t, lags=0, leave_out=3).msss_climatology < hc.msss_climatology - 0.3


def test_no_skill_gives_a_climatological_outlook_with_its_reason():
    P, t = _synthetic(4, 0.0)
    c = cuts_by_rule(t.index, t.to_numpy(), "bottom_mean_c")
    table, hc, o = skill_and_outlook(P, t, [0, 1, 2], c, leave_out=3)
    assert o["basis"] == "climatology"
    assert "not positive" in o["reason"] or "q-value" in o["reason"]
    # The class probabilities are the reference period's class frequencies (terciles here).
    cls = ["cold" if v < c.low else "warm" if v > c.high else "average" for v in t]
    freq = [cls.count(k) / len(cls) for k in ("cold", "average", "warm")]
    assert [o["p_cold"], o["p_average"], o["p_warm"]] == pytest.approx(freq)
    assert o["climatology"] == pytest.approx(freq)
    assert o["lo"] < o["predicted"] < o["hi"]
    text = outlook_sentence(o, "bottom_mean_c")
    assert "the outlook is climatological" in text
    assert "no demonstrable skill" in text and "persistence" in text


def test_outlook_lag_can_be_given_and_must_be_requested():
    P, t = _synthetic(3, -0.9)
    c = cuts_by_rule(t.index, t.to_numpy(), "bottom_mean_c")
    _, hc, o = skill_and_outlook(P, t, [0, 1, 2], c, outlook_lag=2)
    assert hc.lags == (2,) and set(hc.table["lag"]) == {2} and o["lag"] == 2
    assert o["basis"] == "climatology"  # nothing at lag 2
    with pytest.raises(InputError, match="skill.outlook_lag 3 is not among the lags 0, 1, 2"):
        skill_and_outlook(P, t, [0, 1, 2], c, outlook_lag=3)


def test_too_few_common_years(sample):
    P, t = sample
    with pytest.raises(TooFewDataError, match="at least 10"):
        hindcast(P, t.loc[:int(t.index.min()) + 4], lags=0)


def test_skill_cli_end_to_end(tmp_path: Path, sample):
    _, t = sample
    target = tmp_path / "target.csv"
    pd.DataFrame({"Year": t.index, "bottom_mean_c": t.to_numpy(),
                  "median_doy": 36.0}).to_csv(target, index=False)
    result = CliRunner().invoke(app, ["skill", "--ice", str(SAMPLE / "ice.csv"), "--target",
                                      str(target), "--value", "bottom_mean_c", "--out",
                                      str(tmp_path / "o"), "--target-columns", "year=Year",
                                      "--months", "5-10"])
    assert result.exit_code == 0, result.output
    text = " ".join(result.output.split())
    assert "survey month 2, from the median survey day" in text
    assert f"bottom_mean_c in {int(t.index.max()) + 1} is forecast" in text
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


def test_skill_cli_needs_a_survey_month(tmp_path: Path, sample):
    _, t = sample
    target = tmp_path / "target.csv"
    pd.DataFrame({"year": t.index, "bottom_mean_c": t.to_numpy()}).to_csv(target, index=False)
    args = ["skill", "--ice", str(SAMPLE / "ice.csv"), "--target", str(target), "--value",
            "bottom_mean_c", "--months", "5-10"]
    result = CliRunner().invoke(app, [*args, "--out", str(tmp_path / "o")])
    assert result.exit_code == 2 and "--survey-month" in result.output
    assert "Traceback" not in result.output
    assert not (tmp_path / "o" / "skill.csv").exists()
    result = CliRunner().invoke(app, [*args, "--out", str(tmp_path / "o2"), "--survey-month",
                                      "1"])
    assert result.exit_code == 0, result.output
    assert (tmp_path / "o2" / "skill.csv").is_file()


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
