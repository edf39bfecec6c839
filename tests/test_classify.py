import numpy as np
import pytest

from coldindex.classify import Cuts, classify, colder_direction, cuts_by_rule
from coldindex.errors import InputError

YEARS = np.arange(2001, 2010)
VALUES = np.arange(1.0, 10.0)


def test_terciles_hand_computed():
    # Hand-computed, Hyndman & Fan (1996) type 7: h = (n - 1) p; for 1..9,
    # p = 1/3 -> 3 + 2/3, p = 2/3 -> 6 + 1/3.
    c = cuts_by_rule(YEARS, VALUES, "bottom_mean_c")
    assert c.low == pytest.approx(11 / 3) and c.high == pytest.approx(19 / 3)
    assert c.direction == "lower" and c.rule == "tercile"


def test_sd_rule_and_reference():
    c = cuts_by_rule(YEARS, VALUES, "bottom_mean_c", "sd:0.5")
    sd = np.sqrt(7.5)  # sample SD of 1..9 (ddof = 1)
    assert c.low == pytest.approx(5 - 0.5 * sd) and c.high == pytest.approx(5 + 0.5 * sd)
    r = cuts_by_rule(YEARS, VALUES, "bottom_mean_c", "tercile", (2001, 2003))
    assert r.low == pytest.approx(1 + 2 / 3) and r.reference == "2001-2003"


def test_direction_for_areas_and_temperatures():
    assert colder_direction("below_2c_km2") == "higher"
    assert colder_direction("below_m1c_km2_map") == "higher"
    assert colder_direction("bottom_mean_c") == "lower"
    with pytest.raises(InputError, match="classify.colder lower|higher"):
        colder_direction("recruits")
    temps = classify(YEARS, VALUES, cuts_by_rule(YEARS, VALUES, "bottom_mean_c"))
    areas = classify(YEARS, VALUES, cuts_by_rule(YEARS, VALUES, "below_2c_km2"))
    assert list(temps["class"][:3]) == ["cold"] * 3 and list(temps["class"][-3:]) == ["warm"] * 3
    assert list(areas["class"][:3]) == ["warm"] * 3 and list(areas["class"][-3:]) == ["cold"] * 3


def test_classes_monotone_and_probabilities_sum_to_one():
    rng = np.random.default_rng(0)
    v = rng.normal(size=40)
    c = cuts_by_rule(np.arange(40), v, "bottom_mean_c", "sd:0.43")
    out = classify(np.arange(40), v, c, sd=np.full(40, 0.3))
    rank = out["class"].map({"cold": 0, "average": 1, "warm": 2}).to_numpy()
    assert np.all(np.diff(rank[np.argsort(v)]) >= 0)
    np.testing.assert_allclose(out[["p_cold", "p_average", "p_warm"]].sum(axis=1), 1.0)
    assert out["z"].std(ddof=1) == pytest.approx(1.0)


def test_value_on_a_cut_is_average_and_nan_is_blank():
    c = Cuts("bottom_mean_c", 1.0, 2.0, "given", None, "lower")
    out = classify([1, 2, 3], [1.0, 2.0, np.nan], c)
    assert list(out["class"]) == ["average", "average", ""]


def test_cuts_roundtrip_refuses_incomplete():
    c = Cuts("bottom_mean_c", 1.0, 2.0, "given", None, "lower")
    assert Cuts.from_dict(c.to_dict()) == c
    with pytest.raises(InputError, match="lacks"):
        Cuts.from_dict({"column": "x"})
