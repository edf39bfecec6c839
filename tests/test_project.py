from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy.stats import norm
from typer.testing import CliRunner

from coldindex.classify import Cuts
from coldindex.cli import app
from coldindex.errors import InputError, TooFewDataError
from coldindex.project import (
    ProjectOptions,
    adjust_series,
    ar1_noise,
    check_units,
    local_linear,
    prob_any_cold,
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
    # Hand-worked: model calibration 1..4 and observed 10..40 share the Hazen positions
    # 0.125..0.875 (Hyndman & Fan 1996, definition 5). x = 2.5 lies halfway between
    # positions 0.375 and 0.625 -> tau = 0.5 -> observed median 25. Beyond the range the
    # end correction is kept constant: x = 6 -> 6 + (40 - 4).
    got = quantile_map([2.5, 6.0, 0.0], [1, 2, 3, 4], [10, 20, 30, 40])
    np.testing.assert_allclose(got, [25.0, 42.0, 9.0])


def test_quantile_map_returns_its_own_calibration_sample():
    # One quantile definition for model and observations: mapping the calibration sample
    # onto itself changes nothing (the old mix of Hazen and numpy type 7 moved the coldest
    # of 44 values from -2.33 to -1.81 and mapped 0..4 to 0.4..3.6).
    np.testing.assert_allclose(quantile_map(np.arange(5.0), np.arange(5.0), np.arange(5.0)),
                               np.arange(5.0), atol=1e-12)
    rng = np.random.default_rng(11)
    cal = rng.normal(0, 1, 44)
    np.testing.assert_allclose(quantile_map(cal, cal, cal), cal, atol=1e-12)
    years = np.arange(1982, 2026)
    np.testing.assert_allclose(quantile_delta_map(years, cal, cal, cal, window=44), cal,
                               atol=1e-12)
    # Equal sizes: the i-th smallest model value goes to the i-th smallest observed value.
    obs = rng.gamma(2.0, 1.0, 44)
    np.testing.assert_allclose(np.sort(quantile_map(cal, cal, obs)), np.sort(obs), atol=1e-12)


def _yearly(values, start):
    import xarray as xr

    t = xr.date_range(f"{start}-07-01", periods=len(values), freq="YS-JUL", calendar="noleap")
    return xr.DataArray(np.asarray(values, float), dims="time", coords={"time": t},
                        attrs={"units": "degC"})


def test_qmap_and_qdm_agree_with_xsdba():
    # Reference library: xsdba 0.7 (the bias-adjustment part of xclim), EmpiricalQuantileMapping
    # and QuantileDeltaMapping, additive, group "time". Its empirical quantiles are numpy's
    # type 7 at the nodes it is given, its QDM ranks are (rank - 1) / (n - 1), and
    # interpolation/extrapolation are options. Settings matched, not tuned: nodes
    # linspace(0, 1, n) with n the calibration size (type 7 there = the order statistics,
    # i.e. our Hazen positions), interp="linear", extrapolation="constant"; one 30-year
    # projection window for QDM (the library ranks the whole simulated period). With these
    # the two definitions are the same piecewise-linear map, so agreement is to rounding:
    # tolerance 1e-9 (values of order 1). Source: xsdba documentation, adjustment.py
    # (EmpiricalQuantileMapping, QuantileDeltaMapping), version 0.7.0.
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        import xsdba

        rng = np.random.default_rng(3)
        n = 30
        obs = rng.normal(1, 2, n)
        hist = rng.normal(0, 1, n)
        sim = rng.normal(0.5, 1.3, n) + np.linspace(0, 2, n)  # partly beyond hist's range
        assert sim.max() > hist.max()
        nodes = np.linspace(0, 1, n)
        eqm = xsdba.EmpiricalQuantileMapping.train(
            _yearly(obs, 1991), _yearly(hist, 1991), nquantiles=nodes, kind="+", group="time")
        ref_qm = eqm.adjust(_yearly(sim, 2031), interp="linear",
                            extrapolation="constant").values
        qdm = xsdba.QuantileDeltaMapping.train(
            _yearly(obs, 1991), _yearly(hist, 1991), nquantiles=nodes, kind="+", group="time")
        ref_qdm = qdm.adjust(_yearly(sim, 2031), interp="linear",
                             extrapolation="constant").values
    np.testing.assert_allclose(quantile_map(sim, hist, obs), ref_qm, atol=1e-9)
    np.testing.assert_allclose(quantile_delta_map(np.arange(2031, 2031 + n), sim, hist, obs,
                                                  window=n), ref_qdm, atol=1e-9)


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
    row = res.emergence.iloc[0]
    assert not bool(row["stopped"]) and row["state"] == "not_by_end"
    assert "do not stop being expected by 2030 in most models" in res.summaries[0]


def _ar1(rng, n_years, k, phi, sd):
    e = np.empty((k, n_years))
    e[:, 0] = rng.normal(size=k)
    for t in range(1, n_years):
        e[:, t] = phi * e[:, t - 1] + np.sqrt(1 - phi**2) * rng.normal(size=k)
    return sd * e


def _mc_stop_year(years, m, phi, sd, rng, n=100_000, window=10, p=0.1):
    """Brute force: P(at least one cold year in each window) of the true AR(1), unconditional."""
    cold = m + _ar1(rng, len(years), n, phi, sd) < 0
    c = np.concatenate([np.zeros((n, 1)), np.cumsum(cold, axis=1)], axis=1)
    p_any = ((c[:, window:] - c[:, :-window]) > 0).mean(axis=0)
    return int(years[np.flatnonzero(p_any >= p)[-1] + 1]), p_any


def test_prob_any_cold_matches_brute_force_ar1_and_the_iid_product():
    rng = np.random.default_rng(21)
    years = np.arange(2000, 2041)
    m = -0.6 + 0.05 * (years - 2000)
    pc = norm.cdf(-m / 0.5)
    _, p_mc = _mc_stop_year(years, m, 0.6, 0.5, rng, n=200_000)
    # Monte Carlo SE <= 0.0012 at 200,000 series; band 0.005 (4 SE).
    np.testing.assert_allclose(prob_any_cold(pc, 10, 0.6), p_mc, atol=0.005)
    iid = 1 - np.array([np.prod(1 - pc[k:k + 10]) for k in range(len(pc) - 9)])
    np.testing.assert_allclose(prob_any_cold(pc, 10, 0.0), iid, atol=1e-12)
    np.testing.assert_allclose(prob_any_cold(pc, 10, 1e-9), iid, atol=1e-7)
    # Positive autocorrelation lowers P(at least one cold year): cold years cluster.
    ar = prob_any_cold(pc, 10, 0.6)
    assert np.all(ar < iid) and np.all((iid - ar)[-10:] > 0.01)


def test_ar1_noise_unbiased_where_the_ddof2_spread_is_not():
    # One member, AR(1) lag-1 0.6, marginal SD 0.5, around a curved trend, 40 replicates.
    rng = np.random.default_rng(5)
    years = np.arange(1980, 2101)
    m = 0.5 * np.sin((years - 1980) / 40.0) + 0.02 * (years - 1980)
    sig, phis, naive = [], [], []
    for _ in range(40):
        v = m + _ar1(rng, len(years), 1, 0.6, 0.5)[0]
        _, fit, s, phi = ar1_noise(years, v, np.zeros(len(years)))
        sig.append(s)
        phis.append(phi)
        naive.append(np.sqrt(np.sum((v - fit) ** 2) / (len(v) - 2)))
    # SE of the mean SD over 40 series about 0.008; band 0.03. The ddof-2 SD is about 0.43.
    assert abs(np.mean(sig) - 0.5) < 0.03
    assert np.mean(naive) < 0.46
    assert abs(np.mean(phis) - 0.6) < 0.06


def test_stop_year_under_ar1_noise_matches_the_monte_carlo_truth():
    # Truth by construction: m(t) = 0.015 (t - 2000), AR(1) noise lag-1 0.6, marginal SD 0.5,
    # cold below 0, 10-year window, p = 0.1. The documented quantity, P(at least one cold
    # year in the window) under the true AR(1) (unconditional), by brute force.
    rng = np.random.default_rng(8)
    years = np.arange(1980, 2101)
    m = 0.015 * (years - 2000)
    truth, _ = _mc_stop_year(years, m, 0.6, 0.5, rng)
    # The independent-years product on the true expectation and SD is 3 years late: the
    # band below separates the two.
    naive = stop_year(years, norm.cdf(-m / 0.5), 10, 0.1)
    assert abs(naive - truth) >= 3
    rows = []
    for k in range(9):
        e = _ar1(rng, len(years), 20, 0.6, 0.5)
        rows += [(f"M{k}", "s", f"r{j}", y, v) for j in range(20)
                 for y, v in zip(years, m + e[j], strict=True)]
    res = project(traj(rows), years, m, CUTS, ProjectOptions(adjust="none"))
    ens = res.emergence[res.emergence["model"] == "ensemble median"].iloc[0]
    assert abs(int(ens["stop_year"]) - truth) <= 2
    models = res.emergence[res.emergence["model"] != "ensemble median"]
    assert abs(models["spread"].mean() - 0.5) < 0.02
    assert abs(models["lag1"].mean() - 0.6) < 0.05


def test_never_cold_is_left_censored_and_reported_apart():
    years = np.arange(2000, 2101)
    warm = 3.0 + 0.01 * (years - 2000)                  # never near the cut at 0
    line = -1.025 + 0.05 * (years - 2000)               # stops in 2021 (see above)
    late = -5.0 + 0.0 * years                           # never stops
    rows = [("A", "s", "r1", y, v) for y, v in zip(years, warm, strict=True)]
    rows += [("B", "s", "r1", y, v) for y, v in zip(years, line, strict=True)]
    rows += [("C", "s", "r1", y, v) for y, v in zip(years, late, strict=True)]
    res = project(traj(rows), years, line, CUTS, ProjectOptions(adjust="none"))
    em = res.emergence.set_index("model")
    assert em.loc["A", "state"] == "never_cold" and pd.isna(em.loc["A", "stop_year"])
    assert not bool(em.loc["A", "stopped"])
    assert em.loc["B", "state"] == "stopped" and em.loc["B", "stop_year"] == 2021
    assert em.loc["C", "state"] == "not_by_end"
    # Median of (-inf, 2021, +inf) = 2021; the never-cold model is counted apart.
    assert em.loc["ensemble median", "stop_year"] == 2021
    assert em.loc["ensemble median", "models_never_cold"] == 1
    assert em.loc["ensemble median", "models_stopped"] == 1
    assert "1 never cold in their record" in res.summaries[0]
    # Two never-cold models out of three: the median is left-censored.
    rows2 = rows + [("D", "s", "r1", y, v) for y, v in zip(years, warm, strict=True)]
    rows2 = [r for r in rows2 if r[0] != "C"]
    res2 = project(traj(rows2), years, line, CUTS, ProjectOptions(adjust="none"))
    assert "unlikely throughout the record in most models" in res2.summaries[0]


def test_ensemble_sentence_when_one_of_two_models_stops():
    years = np.arange(2000, 2101)
    line = -1.025 + 0.05 * (years - 2000)
    rows = [("A", "s", "r1", y, v) for y, v in zip(years, line, strict=True)]
    rows += [("B", "s", "r1", y, -5.0) for y in years]
    res = project(traj(rows), years, line, CUTS, ProjectOptions(adjust="none"))
    text = res.summaries[0]
    assert "most models" not in text
    assert "split evenly" in text and "after 2021" in text and "1 not by 2100" in text
    ens = res.emergence.iloc[-1]
    assert ens["state"] == "undetermined" and pd.isna(ens["stop_year"])


def test_calibration_guard_refuses_short_overlaps_unless_accepted():
    rng = np.random.default_rng(2)
    years = np.arange(2014, 2101)
    t = traj([("M", "s", "r1", y, 0.02 * (y - 2014) + rng.normal(0, 0.3)) for y in years])
    oy = np.arange(1990, 2021)  # overlap 2014-2020: 7 years
    obs = rng.normal(0.5, 0.3, len(oy))
    with pytest.raises(TooFewDataError, match=r"overlap in 7 years \(2014-2020\).*at least "
                       r"20.*project.calibration A-B with project.short_calibration"):
        project(t, oy, obs, CUTS, ProjectOptions(adjust="qdm"))
    with pytest.raises(InputError,
                       match="project.short_calibration needs an explicit calibration period"):
        ProjectOptions(adjust="qdm", short_calibration=True)
    res = project(t, oy, obs, CUTS, ProjectOptions(adjust="qdm", calibration=(2014, 2020),
                                                   short_calibration=True))
    row = res.emergence.iloc[0]
    assert bool(row["short_calibration"]) and row["calibration_years"] == 7
    assert (row["calibration_start"], row["calibration_end"]) == (2014, 2020)
    # No adjustment, no calibration: nothing to refuse.
    project(t, oy, obs, CUTS, ProjectOptions(adjust="none"))


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
