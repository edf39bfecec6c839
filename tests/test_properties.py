"""Property-based tests (hypothesis) of the invariants users rely on.

Examples are capped on anything that krigs, to keep the suite fast.
"""

import numpy as np
import pandas as pd
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from coldindex.classify import classify, cuts_by_rule
from coldindex.config import IndexOptions
from coldindex.domain import domain_from_polygon, make_grid, wrap_lon
from coldindex.indices import area_below, area_weighted_mean, compute_indices
from coldindex.project import adjust_series
from coldindex.qc import run_qc
from tests.conftest import synthetic_casts

finite = st.floats(-3, 12, allow_nan=False, allow_infinity=False)


@settings(max_examples=60, deadline=None)
@given(m=arrays(float, 40, elements=finite),
       s=arrays(float, 40, elements=st.floats(0, 3, allow_nan=False)),
       a=arrays(float, 40, elements=st.floats(0.1, 25, allow_nan=False)),
       t1=finite, t2=finite)
def test_areas_monotone_and_bounded(m, s, a, t1, t2):
    lo, hi = sorted((t1, t2))
    assert area_below(m, s, a, lo) <= area_below(m, s, a, hi) + 1e-9
    assert 0.0 <= area_below(m, s, a, hi) <= a.sum() + 1e-9
    assert area_below(m, None, a, lo) <= area_below(m, None, a, hi)


@settings(max_examples=60, deadline=None)
@given(m=arrays(float, 30, elements=finite),
       a=arrays(float, 30, elements=st.floats(0.1, 25, allow_nan=False)))
def test_mean_within_field_range(m, a):
    v = area_weighted_mean(m, a)
    assert m.min() - 1e-9 <= v <= m.max() + 1e-9


@settings(max_examples=60, deadline=None)
@given(v=arrays(float, 25, elements=finite, unique=True))
def test_classes_monotone_in_value(v):
    years = np.arange(2000, 2025)
    for col in ("bottom_mean_c", "below_2c_km2"):
        out = classify(years, v, cuts_by_rule(years, v, col))
        colder_rank = out["class"].map({"cold": 0, "average": 1, "warm": 2}).to_numpy()
        order = np.argsort(v if col.endswith("_c") else -v)
        assert np.all(np.diff(colder_rank[order]) >= 0)


@settings(max_examples=40, deadline=None)
@given(model=arrays(float, 40, elements=finite), obs=arrays(float, 20, elements=finite))
def test_delta_reproduces_calibration_mean(model, obs):
    years = np.arange(1990, 2030)
    oy = np.arange(1990, 2010)
    adj = adjust_series(years, model, oy, obs, "delta", (1990, 2009))
    assert abs(adj[:20].mean() - obs.mean()) < 1e-9


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(model=arrays(float, 40, elements=st.floats(0, 1000, allow_nan=False)),
       obs=arrays(float, 20, elements=st.floats(0, 1000, allow_nan=False)),
       method=st.sampled_from(["none", "delta", "qmap", "qdm"]))
def test_adjusted_areas_within_domain(model, obs, method):
    years = np.arange(1990, 2030)
    adj = adjust_series(years, model, np.arange(1990, 2010), obs, method, (1990, 2009),
                        bound=1000.0)
    assert np.all(adj >= 0) and np.all(adj <= 1000.0)


def _raw(df: pd.DataFrame) -> pd.DataFrame:
    raw = df.astype(str)
    raw.insert(0, "row", np.arange(1, len(df) + 1))
    return raw


_SURVEY = synthetic_casts(years=(2001,), n_side=7)


@settings(max_examples=5, deadline=None)
@given(seed=st.integers(0, 10_000), dup=st.integers(0, 48), shift=st.floats(-179, 179))
def test_order_duplicates_and_longitude_change_nothing(box_domain, seed, dup, shift):
    grid = make_grid(box_domain, 15.0)
    opts = IndexOptions(thresholds=(0.0,), grid_km=15.0, sims=0, min_casts=20,
                        variogram="exponential")
    base = compute_indices(run_qc(_raw(_SURVEY)).casts, box_domain, grid, opts).table
    shuffled = pd.concat([_SURVEY, _SURVEY.iloc[[dup]]]).sample(frac=1, random_state=seed)
    again = compute_indices(run_qc(_raw(shuffled)).casts, box_domain, grid, opts).table
    pd.testing.assert_frame_equal(base, again)
    # The same survey rotated in longitude (across 180 degrees or not).
    moved = _SURVEY.assign(lon=wrap_lon(_SURVEY["lon"] + shift))
    from shapely import transform

    from tests.conftest import BOX_180

    dom = domain_from_polygon(transform(BOX_180, lambda c: np.column_stack(
        [wrap_lon(c[:, 0] + shift), c[:, 1]])))
    rot = compute_indices(run_qc(_raw(moved)).casts, dom, make_grid(dom, 15.0), opts).table
    cols = ["bottom_mean_c", "below_0c_km2", "coverage"]
    # Shifted longitudes differ in their last bits and the variogram fit (an optimiser)
    # carries that to ~1e-7: 1e-6 degC absolute, 1e-5 relative.
    np.testing.assert_allclose(rot[cols].to_numpy(float), base[cols].to_numpy(float),
                               rtol=1e-5, atol=1e-6)
