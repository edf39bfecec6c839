import numpy as np
import pytest

from coldindex.errors import InputError
from coldindex.regimes import (
    ShiftOptions,
    detect_shifts,
    optimal_partition_batch,
    pelt,
    pelt_penalty,
    prewhiten,
    stars,
)
from coldindex.stats import simulate_ar1

YEARS = np.arange(1971, 2021)


@pytest.mark.parametrize("phi", [0.0, 0.3])
@pytest.mark.parametrize("where", [15, 25, 35])
def test_large_steps_found_exactly(phi, where):
    # Truth by construction: a 4-SD step at a known year in white or red noise.
    rng = np.random.default_rng(where + int(10 * phi))
    x = simulate_ar1(phi, 50, 1, rng)[0]
    x[where:] += 4.0
    s, _ = stars(x, cutoff=10, alpha=0.1, huber=1.0)
    assert where in s
    assert where in pelt(x, min_size=5)


def test_dynamic_programme_matches_ruptures():
    rng = np.random.default_rng(2)
    X = simulate_ar1(0.4, 50, 12, rng)
    X[::2, 20:] += 1.5
    pens = [pelt_penalty(s) for s in X]
    ours = optimal_partition_batch(X, pens, 5)
    for s, cps, pen in zip(X, ours, pens, strict=True):
        assert cps == pelt(s, 5, pen)


def test_nile_published_break_year():
    import statsmodels.api as sm

    # Source: Cobb, G. W. (1978), Biometrika 65, 243-251: the Nile's annual flow at Aswan
    # (1871-1970) changed after 1898, so 1899 is the first year of the new regime. Data as
    # shipped in statsmodels.datasets.nile.
    nile = sm.datasets.nile.load_pandas().data
    res = detect_shifts(nile["year"].astype(int), nile["volume"],
                        opts=ShiftOptions(boot=0))
    sh = res.shifts
    assert 1899 in set(sh[sh["method"] == "stars"]["year"])
    assert list(sh[sh["method"] == "pelt"]["year"]) == [1899]
    # The drop: from about 1100 to about 850 (10^8 m^3).
    row = sh[sh["method"] == "pelt"].iloc[0]
    assert row["mean_before"] == pytest.approx(1097.75, abs=0.01)
    assert row["mean_after"] == pytest.approx(849.97, abs=0.01)


def test_stars_hand_worked_example():
    # Worked by hand through Rodionov (2004)'s steps, cut-off l = 3, alpha = 0.1, plain means
    # (Huber H large): x = 0,1,0,1,0,5,6,5,6,5.
    # sigma_l^2 = mean variance (ddof 1) of the eight 3-long windows: six of variance 1/3,
    # (1,0,5) 7 and (0,5,6) 31/3 -> (2 + 7 + 31/3) / 8 = 29/12.
    # diff = t(0.95, 4) * sqrt(2 * (29/12) / 3) = 2.13185 * 1.26930 = 2.70599, with
    # t(0.95, 4) = 2.132 from any Student t table (e.g. Abramowitz & Stegun 1964, Table 26.10).
    # Regime 1 mean = 1/3; x_4 = 1 within +-diff (mean -> 0.5); x_5 = 0 (mean 0.4);
    # x_6 = 5 > 0.4 + 2.706: RSI = sum(x_j - 3.106, j = 6..8) / (3 sigma_l) > 0 -> shift.
    x = [0, 1, 0, 1, 0, 5, 6, 5, 6, 5]
    shifts, rsi = stars(x, cutoff=3, alpha=0.1, huber=1e9)
    assert shifts == [5]
    sigma = np.sqrt(29 / 12)
    level = 0.4 + 2.13185 * np.sqrt(2 * (29 / 12) / 3)
    expected = sum(v - level for v in (5, 6, 5)) / (3 * sigma)
    assert rsi[0] == pytest.approx(expected, abs=1e-3)


def test_bad_series():
    with pytest.raises(InputError, match="at least twice the cut-off"):
        detect_shifts(np.arange(15), np.arange(15.0), ("stars",))
    with pytest.raises(InputError, match="constant"):
        detect_shifts(np.arange(30), np.ones(30))
    with pytest.raises(InputError, match="appears more than once"):
        detect_shifts([1, 1, 2], [1.0, 2.0, 3.0])


def test_gaps_are_closed_up_and_listed():
    rng = np.random.default_rng(5)
    v = rng.normal(size=50)
    v[25:] += 4
    v[10] = np.nan
    yrs = np.delete(YEARS, 30)
    vals = np.delete(v, 30)
    res = detect_shifts(yrs[::-1], vals[::-1], ("pelt",), ShiftOptions(boot=0))
    assert res.skipped_years == [1981, 2001]
    assert list(res.shifts["year"]) == [1996]


def test_prewhitening_reduces_red_noise():
    x = simulate_ar1(0.6, 200, 1, np.random.default_rng(3))[0]
    w, rho = prewhiten(x, "mpk", 20)
    assert 0.3 < rho < 0.9 and len(w) == 199
    _, rho4 = prewhiten(x, "ip4", 20)
    assert 0.3 < rho4 < 0.9


def series_with_a_significant_shift(X: np.ndarray) -> dict[str, int]:
    """Per method, how many series report any shift with p < 0.1 (99 replicates, default
    settings, seed = series index)."""
    hits = {"stars": 0, "pelt": 0}
    for i, x in enumerate(X):
        res = detect_shifts(YEARS, x, opts=ShiftOptions(boot=99, seed=i))
        for m in hits:
            p = res.shifts.loc[res.shifts["method"] == m, "p_value"]
            hits[m] += bool((p < 0.1).any())
    return hits


def test_bootstrap_size_on_red_noise():
    # Size of the whole-detection bootstrap (fixed seed, default settings): 200 AR(1) null
    # series (rho = 0.5, n = 50), 99 bootstrap replicates each. The share reporting any
    # shift with p < 0.1 must lie in [3 %, 17 %] for each method, while plain STARS
    # reports a shift in more than half of them. Estimator: share of series.
    X = simulate_ar1(0.5, 50, 200, np.random.default_rng(2026))
    plain = np.mean([len(stars(x)[0]) > 0 for x in X])
    assert plain > 0.5
    hits = series_with_a_significant_shift(X)
    for m, h in hits.items():
        assert 0.03 <= h / len(X) <= 0.17, (m, h)


def test_bootstrap_power_grows_with_the_step():
    # Truth by construction: a 3-SD step after year 25 in AR(1) noise (rho = 0.5, n = 50).
    # The test must find it far more often than its size (measured about 50 %; the whole-
    # series AR(1) estimate made it about 1 %, below the size); 100 series, 99 replicates.
    X = simulate_ar1(0.5, 50, 100, np.random.default_rng(77))
    X[:, 25:] += 3.0
    hits = series_with_a_significant_shift(X)
    assert hits["stars"] >= 30 and hits["pelt"] >= 30, hits
