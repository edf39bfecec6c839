import numpy as np
import pandas as pd
import pytest
from pyproj import Geod
from shapely.geometry import Polygon, box

from coldindex.config import IndexOptions
from coldindex.domain import domain_from_polygon, make_grid
from coldindex.indices import area_below, area_weighted_mean, compute_indices, coverage_share
from coldindex.qc import run_qc
from tests.conftest import synthetic_casts


def qc_casts(df):
    raw = df.astype(str)
    raw.insert(0, "row", np.arange(1, len(df) + 1))
    return run_qc(raw).casts


def test_area_below_units():
    a = np.array([25.0, 25.0, 10.0])
    m = np.array([-1.0, 1.0, 3.0])
    assert area_below(m, None, a, 0.0) == 25.0
    assert area_below(m, np.zeros(3), a, 0.0) == 25.0
    # Phi(0) = 0.5 at the threshold itself.
    assert area_below(np.array([0.0]), np.array([1.0]), np.array([10.0]), 0.0) == 5.0
    assert area_weighted_mean(m, a) == pytest.approx((-25 + 25 + 30) / 60)


def test_area_monotone_in_threshold():
    rng = np.random.default_rng(0)
    m, s, a = rng.normal(1, 1, 500), rng.uniform(0, 1, 500), rng.uniform(1, 25, 500)
    areas = [area_below(m, s, a, t) for t in np.linspace(-3, 5, 30)]
    assert np.all(np.diff(areas) >= 0)
    assert areas[-1] <= a.sum()


def test_coverage_share():
    cells = np.array([[0.0, 0.0], [10.0, 0.0], [100.0, 0.0]])
    assert coverage_share([[0.0, 0.0]], cells, [1.0, 1.0, 2.0], 8.0) == pytest.approx(0.5)


def geodesic_area(poly: Polygon) -> float:
    from shapely import segmentize

    area, _ = Geod(ellps="WGS84").geometry_area_perimeter(segmentize(poly, 0.01))
    return abs(area) / 1e6


@pytest.fixture(scope="module")
def synthetic_result(box_domain):
    casts = qc_casts(synthetic_casts(years=(2001,), n_side=13))
    opts = IndexOptions(thresholds=(0.0, 1.0), grid_km=5.0, sims=40, min_casts=20,
                        variogram="exponential")
    grid = make_grid(box_domain, 5.0)
    return compute_indices(casts, box_domain, grid, opts), casts, grid


def test_known_cold_area(synthetic_result):
    res, _, _ = synthetic_result
    row = res.table.iloc[0]
    # Truth by construction: T = 2 (lat - 61) degC, so T < 0 exactly south of 61N.
    # The reference area comes from pyproj.Geod on the box 178.5E..178.5W, 60..61N (Karney
    # 2013), independent of the project's grid. Tolerance 1 %: kriging of a linear trend
    # from a 13 x 13 lattice plus 5 km cell edges along the contour.
    south = box(178.5, 60.0, 181.5, 61.0)
    truth = geodesic_area(south)
    assert row["below_0c_km2"] == pytest.approx(truth, rel=0.01)
    assert row["below_0c_km2_map"] == pytest.approx(truth, rel=0.01)
    # T < 1 degC exactly south of 61.5N.
    assert row["below_1c_km2"] == pytest.approx(geodesic_area(box(178.5, 60.0, 181.5, 61.5)),
                                                rel=0.01)
    assert row["coverage"] > 0.99
    assert row["bottom_mean_c"] == pytest.approx(0.0, abs=0.05)
    assert row["below_0c_km2_lo90"] <= row["below_0c_km2"] <= row["below_0c_km2_hi90"]
    # A plane has no finite length scale: the fit ends at its bound, says so, and the
    # simulation of such a long-range field is the exact one.
    assert "length scale at its upper bound" in row["note"]
    assert row["simulation"] == "exact" and "simulated exactly" in row["note"]


def test_same_survey_across_antimeridian_gives_same_indices(synthetic_result):
    res, _, _ = synthetic_result
    moved = synthetic_casts(lon0=0.0, years=(2001,), n_side=13)
    casts = qc_casts(moved)
    poly = Polygon([(-1.5, 60.0), (1.5, 60.0), (1.5, 62.0), (-1.5, 62.0)])
    dom = domain_from_polygon(poly)
    opts = IndexOptions(thresholds=(0.0, 2.0), grid_km=5.0, sims=40, min_casts=20,
                        variogram="exponential")
    res2 = compute_indices(casts, dom, make_grid(dom, 5.0), opts)
    cols = ["bottom_mean_c", "below_0c_km2", "below_0c_km2_map", "cv_rmse_c", "coverage"]
    np.testing.assert_allclose(res.table[cols].to_numpy(float), res2.table[cols].to_numpy(float),
                               rtol=1e-6)


def test_row_order_changes_nothing(box_domain):
    df = synthetic_casts(years=(2001, 2002), n_side=9)
    opts = IndexOptions(thresholds=(0.0,), grid_km=10.0, sims=10, min_casts=20)
    grid = make_grid(box_domain, 10.0)
    a = compute_indices(qc_casts(df), box_domain, grid, opts).table
    b = compute_indices(qc_casts(df.sample(frac=1, random_state=2)), box_domain, grid,
                        opts).table
    pd.testing.assert_frame_equal(a, b)


def test_years_without_enough_casts_or_coverage(box_domain):
    df = synthetic_casts(years=(2001, 2002, 2003), n_side=9)
    df = df[~((df["year"] == 2002) & (df["lon"] < 179.9) & (df["lon"] > 0))]  # west half gone
    df = df[~((df["year"] == 2003) & (df.index % 4 != 0))]  # a quarter of the casts
    opts = IndexOptions(thresholds=(0.0,), grid_km=10.0, sims=0, min_casts=25)
    res = compute_indices(qc_casts(df), box_domain, make_grid(box_domain, 10.0), opts)
    t = res.table.set_index("year")
    assert t.loc[2001, "note"] != t.loc[2001, "note"] or not t.loc[2001, "note"]
    assert "coverage" in t.loc[2002, "note"] and np.isnan(t.loc[2002, "below_0c_km2"])
    assert "fewer than the minimum 25" in t.loc[2003, "note"]
    assert np.isnan(t.loc[2003, "bottom_mean_c"])
    assert "below_0c_km2_sd" not in t.columns


def test_idw_gives_map_areas_and_says_so(box_domain):
    df = synthetic_casts(years=(2001,), n_side=9)
    opts = IndexOptions(thresholds=(0.0,), grid_km=10.0, sims=0, min_casts=20, method="idw")
    t = compute_indices(qc_casts(df), box_domain, make_grid(box_domain, 10.0), opts).table
    assert t.loc[0, "below_0c_km2"] == t.loc[0, "below_0c_km2_map"]
    assert "no uncertainty" in t.loc[0, "note"]
    assert np.isnan(t.loc[0, "cv_msse"])


def test_auto_family_is_chosen_and_frozen_family_reused(box_domain):
    df = synthetic_casts(years=(2001, 2002), n_side=9)
    grid = make_grid(box_domain, 10.0)
    opts = IndexOptions(thresholds=(0.0,), grid_km=10.0, sims=0, min_casts=20)
    res = compute_indices(qc_casts(df), box_domain, grid, opts)
    assert res.family in ("exponential", "spherical", "matern", "gaussian")
    assert set(res.family_scores) == {"exponential", "spherical", "matern", "gaussian"}
    again = compute_indices(qc_casts(df), box_domain, grid, opts, frozen_family="gaussian")
    assert again.family == "gaussian" and again.family_scores == {}
    assert again.table["variogram"].str.startswith("gaussian").all()


def test_bathymetry_drift_and_per_year_family(box_domain):
    df = synthetic_casts(years=(2001, 2002), n_side=9)
    grid = make_grid(box_domain, 10.0)
    lon = np.arange(176.0, 184.01, 0.25)
    lat = np.arange(59.0, 63.01, 0.25)
    depth = 50 + 20 * (lat[:, None] - 59) + 0 * lon[None, :]
    opts = IndexOptions(thresholds=(0.0,), grid_km=10.0, sims=5, min_casts=20,
                        per_year_family=True)
    res = compute_indices(qc_casts(df), box_domain, grid, opts, (lon, lat, depth))
    assert res.family == "per-year"
    assert res.table["below_0c_km2"].notna().all()
    # Temperature is linear in latitude, and so is depth: the drift explains it.
    assert (res.table["cv_rmse_c"] < 0.2).all()
    small = (lon[:5], lat[:5], depth[:5, :5])
    from coldindex.errors import InputError

    with pytest.raises(InputError, match="does not cover"):
        compute_indices(qc_casts(df), box_domain, grid, opts, small)


def test_coverage_uses_a_fixed_reference_so_denser_years_never_score_lower(box_domain):
    # Same stations; the dense year adds casts between them. Against its own (shrinking)
    # spacing the dense year could score lower; against the frozen reference it cannot.
    from coldindex.domain import station_spacing_km
    from coldindex.indices import reference_spacing

    grid = make_grid(box_domain, 5.0)
    cells, area = grid.active_xy(), grid.active_area()
    sparse = qc_casts(synthetic_casts(years=(2001,), n_side=7))
    dense = qc_casts(synthetic_casts(years=(2001,), n_side=13))
    xy = {k: np.column_stack(box_domain.to_xy(c["lon"].to_numpy(), c["lat"].to_numpy()))
          for k, c in (("sparse", sparse), ("dense", dense))}
    own = {k: coverage_share(v, cells, area, station_spacing_km(*v.T)) for k, v in xy.items()}
    ref = reference_spacing([station_spacing_km(*v.T) for v in xy.values()])
    fixed = {k: coverage_share(v, cells, area, ref) for k, v in xy.items()}
    assert own["dense"] < own["sparse"]  # the old rule penalised the denser year
    assert fixed["dense"] >= fixed["sparse"]


def test_revisions_name_the_new_fit_and_coverage_rule_of_an_older_release():
    from coldindex.release import revisions_table

    prev = pd.DataFrame({"year": [2001], "below_0c_km2": [100.0]})
    cur = pd.DataFrame({"year": [2001], "below_0c_km2": [110.0]})
    old_prov = {"version": "0.1.0", "frozen": {"variogram_family": "exponential"},
                "parameters": {"sims": 200}}
    new_prov = {"version": "0.1.0",
                "frozen": {"variogram_family": "exponential", "reference_spacing_km": 25.0},
                "parameters": {"sims": 200, "fit": "reml"}}
    cause = revisions_table(cur, prev, new_prov, old_prov, 1e-6)["cause"].iloc[0]
    assert "variogram fit method changed (wls -> reml)" in cause
    assert "frozen reference spacing (25.0 km)" in cause
