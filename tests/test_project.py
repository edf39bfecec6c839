from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy.stats import norm
from typer.testing import CliRunner

from coldindex.classify import Cuts
from coldindex.cli import app
from coldindex.errors import InputError
from coldindex.project import (
    ProjectOptions,
    adjust_series,
    check_units,
    local_linear,
    project,
    quantile_delta_map,
    quantile_map,
    stop_year,
    trajectory_frame,
)
from tests.conftest import SAMPLE

CUTS = Cuts("bottom_mean_c", 0.0, 1.0, "given", None, "lower")


def traj(rows):
    df = pd.DataFrame(rows, columns=["model", "scenario", "member", "year", "value"]).astype(str)
    df.insert(0, "row", np.arange(1, len(df) + 1))
    return trajectory_frame(df)


def test_delta_reproduces_observed_calibration_mean():
    rng = np.random.default_rng(0)
    years = np.arange(1980, 2101)
    model = 2.0 + 0.02 * (years - 1980) + rng.normal(0, 0.5, len(years))
    oy = np.arange(1980, 2021)
    obs = 0.5 + rng.normal(0, 0.4, len(oy))
    adj = adjust_series(years, model, oy, obs, "delta", (1980, 2020))
    cal = (years >= 1980) & (years <= 2020)
    # Definition (common practice, no single source): additive delta matches the means.
    assert adj[cal].mean() == pytest.approx(obs.mean(), abs=1e-12)
    np.testing.assert_allclose(adj - model, obs.mean() - model[cal].mean())


def test_quantile_map_hand_worked():
    # Hand-worked: model calibration 1..4 (plotting positions 0.125..0.875), observed 10..40.
    # x = 2.5 lies halfway between positions 0.375 and 0.625 -> tau = 0.5 -> observed
    # median 25. Beyond the range the end correction is kept constant: x = 6 -> 6 + (obs
    # quantile at 0.875 - 4) = 6 + (36.25 - 4).
    got = quantile_map([2.5, 6.0], [1, 2, 3, 4], [10, 20, 30, 40])
    assert got[0] == pytest.approx(25.0)
    assert got[1] == pytest.approx(6 + (np.quantile([10, 20, 30, 40], 0.875) - 4))


def test_qdm_keeps_model_change_where_quantile_mapping_saturates():
    # Cannon et al. 2015 (J. Climate 28, eqs. 2-6), the property QDM is built for: a
    # projection window that is the calibration climate shifted by +3 keeps that +3 change
    # at every quantile after adjustment; plain quantile mapping does not (it rescales the
    # change by the ratio of spreads inside the range and extrapolates a constant beyond).
    rng = np.random.default_rng(2)
    cal = rng.normal(0, 1, 30)
    obs = rng.normal(1, 2, 30)
    years = np.arange(2031, 2061)  # one 30-year window: every year's window is the series
    base = quantile_delta_map(years, cal, cal, obs, window=30)
    shifted = quantile_delta_map(years, cal + 3.0, cal, obs, window=30)
    np.testing.assert_allclose(shifted - base, 3.0, atol=1e-9)
    change_qm = quantile_map(cal + 3.0, cal, obs) - quantile_map(cal, cal, obs)
    assert np.abs(change_qm - 3.0).max() > 1.0


def test_quantile_mapping_helps_on_held_out_years():
    # Judged on held-out calibration years (cross-validated): fit on odd years, test on even.
    rng = np.random.default_rng(5)
    years = np.arange(1801, 2021)
    obs = rng.gamma(2.0, 1.0, len(years))
    model = 0.5 * rng.gamma(2.0, 1.0, len(years)) + 2.0  # biased and too narrow
    odd = years % 2 == 1
    adj = quantile_map(model[~odd], model[odd], obs[odd])
    q = np.linspace(0.1, 0.9, 9)
    err_raw = np.abs(np.quantile(model[~odd], q) - np.quantile(obs[~odd], q)).mean()
    err_adj = np.abs(np.quantile(adj, q) - np.quantile(obs[~odd], q)).mean()
    assert err_adj < 0.5 * err_raw


@pytest.mark.parametrize("method", ["none", "delta", "qmap", "qdm"])
def test_areas_stay_within_domain(method):
    rng = np.random.default_rng(3)
    years = np.arange(1980, 2101)
    area = 1000.0
    model = np.clip(900 - 8 * (years - 1980) + rng.normal(0, 150, len(years)), 0, area)
    oy = np.arange(1980, 2021)
    obs = np.clip(950 - 5 * (oy - 1980) + rng.normal(0, 100, len(oy)), 0, area)
    obs[:3] = area  # full-domain years
    adj = adjust_series(years, model, oy, obs, method, (1980, 2020), bound=area)
    assert np.all(adj >= 0) and np.all(adj <= area)
    assert (adj == 0).any() or method == "none" or adj.min() < 50


def test_noise_free_stop_year_exact():
    # Truth by construction: value = -1.025 + 0.05 (year - 2000), no noise; cold = value < 0.
    # Cold through 2020 (value -0.025), never from 2021: stop year 2021 exactly.
    years = np.arange(2000, 2101)
    line = -1.025 + 0.05 * (years - 2000)
    t = traj([("M", "s", "r1", y, v) for y, v in zip(years, line, strict=True)])
    res = project(t, years, line, CUTS, ProjectOptions(adjust="none", window=10, p_stop=0.1))
    row = res.emergence.iloc[0]
    assert row["stop_year"] == 2021 and bool(row["stopped"])
    assert row["last_cold_year"] == 2020


def test_noisy_probability_and_stop_year_band():
    # Truth by construction: m(t) = -1 + 0.03 (t - 2000), Gaussian noise SD 0.4, 20 members.
    rng = np.random.default_rng(9)
    years = np.arange(2000, 2101)
    m = -1 + 0.03 * (years - 2000)
    rows = [("M", "s", f"r{k}", y, v) for k in range(20)
            for y, v in zip(years, m + rng.normal(0, 0.4, len(years)), strict=True)]
    res = project(traj(rows), years, m, CUTS, ProjectOptions(adjust="none"))
    p = res.projection.groupby("year")["p_cold"].first()
    truth = norm.cdf((0 - m) / 0.4)
    assert np.abs(p.to_numpy() - truth).max() < 0.05
    # Stop year from the true probabilities, independent years in a 10-year window.
    true_stop = stop_year(years, truth, 10, 0.1)
    assert abs(int(res.emergence.iloc[0]["stop_year"]) - true_stop) <= 3


def test_stop_year_none_and_zero_spread():
    years = np.arange(2000, 2031)
    assert stop_year(years, np.full(len(years), 0.5), 10, 0.1) is None
    assert stop_year(years, np.zeros(len(years)), 10, 0.1) == 2000
    t = traj([("M", "s", "r1", y, -5.0) for y in years])
    res = project(t, years, np.full(len(years), -5.0), CUTS, ProjectOptions(adjust="none"))
    assert not bool(res.emergence.iloc[0]["stopped"])
    assert "not by 2030" in res.summaries[0]


def test_local_linear_reproduces_a_line():
    years = np.arange(2000, 2101)
    np.testing.assert_allclose(local_linear(years, 3 + 0.1 * years, years), 3 + 0.1 * years)


def test_bad_trajectories():
    with pytest.raises(InputError, match="has gaps"):
        traj([("M", "s", "r1", 2000, 1.0), ("M", "s", "r1", 2002, 1.0)])
    with pytest.raises(InputError, match="differ from the unit"):
        check_units("bottom_mean_c", "K")
    check_units("bottom_mean_c", "°C")
    years = np.arange(2050, 2080)
    t = traj([("M", "s", "r1", y, 1.0) for y in years])
    with pytest.raises(InputError, match="do not overlap"):
        project(t, np.arange(1980, 2000), np.zeros(20), CUTS,
                ProjectOptions(adjust="delta", calibration=(1980, 1999)))


def test_project_cli_on_sample(tmp_path: Path):
    from coldindex.demo import FIRST_YEAR, LAST_YEAR, MODELS, SCENARIOS

    obs = tmp_path / "obs.csv"
    rng = np.random.default_rng(4)
    years = np.arange(FIRST_YEAR, LAST_YEAR + 1)
    pd.DataFrame({"year": years, "bottom_mean_c": 0.5 + 0.03 * (years - FIRST_YEAR)
                  + rng.normal(0, 0.5, len(years))}).to_csv(obs, index=False)
    result = CliRunner().invoke(app, ["project", str(SAMPLE / "trajectories.csv"),
                                      "--observed", str(obs), "--value", "bottom_mean_c",
                                      "--out", str(tmp_path / "o"), "--units", "degC"])
    assert result.exit_code == 0, result.output
    for scenario in SCENARIOS:
        assert f"Under scenario {scenario}, cold years stop being expected" in result.output
    proj = pd.read_csv(tmp_path / "o" / "projection.csv")
    assert list(proj.columns) == ["model", "scenario", "member", "year", "value",
                                  "value_adjusted", "class", "p_cold", "p_warm",
                                  "cold_freq_window"]
    em = pd.read_csv(tmp_path / "o" / "emergence.csv")
    assert set(em["model"]) >= {*MODELS, "ensemble median"}
    result = CliRunner().invoke(app, ["project", str(SAMPLE / "trajectories.csv"),
                                      "--observed", str(obs), "--value", "bottom_mean_c",
                                      "--out", str(tmp_path / "o2"), "--units", "K"])
    assert result.exit_code == 2 and "differ from the unit" in result.output
    assert not (tmp_path / "o2" / "projection.csv").exists()
