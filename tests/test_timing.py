"""Survey timing: a survey-day drift recovers a known warming rate; a reference day."""

import numpy as np
import pandas as pd
import pytest

from coldindex.config import IndexOptions
from coldindex.domain import make_grid
from coldindex.errors import ConfigError, InputError
from coldindex.indices import compute_indices, survey_day
from coldindex.qc import run_qc

RATE = 0.05  # degC per day: the truth, by construction


def _warming_survey(seed: int = 11) -> pd.DataFrame:
    """A 9 x 9 station grid over BOX_180, visited in a random order, two stations a day.

    The field rises 2 degC per degree of latitude and warms by RATE each day; the visiting
    order is random, so the survey day is not confounded with position.
    """
    rng = np.random.default_rng(seed)
    lons = np.linspace(178.65, 181.35, 9)
    lats = np.linspace(60.1, 61.9, 9)
    rows = []
    for yr in (2001, 2002):
        order = rng.permutation(81)
        for k, idx in enumerate(order):
            i, j = divmod(int(idx), 9)
            day = 1 + k // 2
            t = 2.0 * (lats[i] - 61.0) + RATE * (day - 20) + rng.normal(0, 0.05)
            date = pd.Timestamp(f"{yr}-01-01") + pd.Timedelta(days=day - 1)
            rows.append({"year": yr, "station": f"S{i:02d}{j:02d}", "lat": lats[i],
                         "lon": ((lons[j] + 180) % 360) - 180, "bottom_c": round(t, 4),
                         "date": date.strftime("%Y-%m-%d")})
    return pd.DataFrame(rows)


def _qc(df):
    raw = df.astype(str)
    raw.insert(0, "row", np.arange(1, len(df) + 1))
    return run_qc(raw).casts


# Depth deepens 100 m per degree north, so the field's latitude gradient is 0.02 degC per m
# of depth: the depth drift carries the spatial trend, the survey-day drift the warming.
BATHY = (np.linspace(178.0, 182.0, 41), np.linspace(59.5, 62.5, 31),
         np.repeat((20.0 + 100.0 * (np.linspace(59.5, 62.5, 31) - 60.0))[:, None], 41, axis=1))


def test_survey_day_drift_recovers_the_warming_rate(box_domain):
    casts = _qc(_warming_survey())
    grid = make_grid(box_domain, 10.0)
    opts = IndexOptions(thresholds=(0.0,), grid_km=10.0, sims=0, min_casts=20,
                        timing_drift=True, reference_day=30.0)
    res = compute_indices(casts, box_domain, grid, opts, BATHY)
    t = res.table
    assert res.reference_day == 30.0
    # The fitted rate: 81 casts over 41 days with 0.05 degC noise give an SE near 0.0005.
    assert t["timing_rate_c_per_day"].to_numpy() == pytest.approx([RATE, RATE], abs=0.004)
    # Every cell is predicted at the reference day: the truth there, by construction.
    lat = grid.lat[grid.mask]
    truth = 2.0 * (lat - 61.0) + RATE * (30 - 20)
    for k in range(2):
        assert np.max(np.abs(res.estimate[k] - truth)) < 0.1
        assert abs(np.mean(res.estimate[k] - truth)) < 0.02
    med = casts.groupby("year")["date"].apply(
        lambda d: float(np.median(pd.to_datetime(d).dt.day_of_year)))
    np.testing.assert_allclose(t["timing_adjustment_c"],
                               t["timing_rate_c_per_day"] * (30.0 - med.to_numpy()))
    # Without the drift the map mixes the survey's days: its mean sits near the median day.
    plain = compute_indices(casts, box_domain, grid, IndexOptions(
        thresholds=(0.0,), grid_km=10.0, sims=0, min_casts=20), BATHY)
    gap = t["bottom_mean_c"] - plain.table["bottom_mean_c"]
    np.testing.assert_allclose(gap, t["timing_adjustment_c"], atol=0.1)
    assert (gap > 0.3).all()  # the reference day lies ~9 days after the median: warmer


def test_survey_day_crosses_the_new_year_and_needs_dates(box_domain):
    df = pd.DataFrame({"year": [2002, 2002, 2002], "date": ["2001-12-30", "2002-01-02", ""],
                       "doy": [364.0, 2.0, np.nan]})
    assert survey_day(df).tolist()[:2] == [-1.0, 2.0]
    assert np.isnan(survey_day(df).iloc[2])
    survey = _warming_survey()
    survey.loc[3, "date"] = ""
    with pytest.raises(InputError, match="index.timing_drift needs a date for every cast"):
        compute_indices(_qc(survey), box_domain, make_grid(box_domain, 10.0),
                        IndexOptions(thresholds=(0.0,), grid_km=10.0, sims=0, min_casts=20,
                                     timing_drift=True))
    with pytest.raises(ConfigError, match="index.timing_drift"):
        IndexOptions(method="idw", timing_drift=True)


def test_index_cli_freezes_the_reference_day(tmp_path):
    import json

    from typer.testing import CliRunner

    from coldindex.cli import app

    casts = tmp_path / "casts.csv"
    _warming_survey().to_csv(casts, index=False)
    out = tmp_path / "out"
    args = ["index", str(casts), "--out", str(out), "--grid-km", "20", "--sims", "0",
            "--min-casts", "20", "--timing-drift"]
    r = CliRunner().invoke(app, args)
    assert r.exit_code == 0, r.output
    frozen = json.loads((out / "frozen.json").read_text())
    qc = pd.read_csv(out / "qc.csv")
    used = _warming_survey().iloc[qc.index[qc["flag"] == "ok"]]
    # The median survey day of the casts used (the derived domain leaves some out).
    assert frozen["reference_day"] == float(np.median(pd.to_datetime(used["date"]).dt.day_of_year))
    ind = pd.read_csv(out / "indices.csv")
    assert ind["timing_rate_c_per_day"].notna().all()
    r = CliRunner().invoke(app, [*args[:-1], "--timing-drift", "--reference-day", "500"])
    assert r.exit_code != 0 and "--reference-day" in r.output
