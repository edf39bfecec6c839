"""Sea-surface indices: kriged from surface_c when the casts carry it."""

import numpy as np
import pytest

from coldindex.config import IndexOptions
from coldindex.domain import make_grid
from coldindex.indices import compute_indices
from coldindex.qc import run_qc
from coldindex.report.page import column_label
from tests.conftest import synthetic_casts


def _qc(df):
    raw = df.astype(str).replace("nan", "")
    raw.insert(0, "row", np.arange(1, len(df) + 1))
    return run_qc(raw).casts


def test_surface_indices_follow_the_surface_field(box_domain):
    df = synthetic_casts(years=(2001, 2002), n_side=9)
    # The surface is the bottom field plus 3 degC: its mean is 3 degC warmer, by construction.
    df["surface_c"] = (df["bottom_c"] + 3.0).round(4)
    df.loc[df["year"] == 2002, "surface_c"] = np.nan  # no surface values in 2002
    grid = make_grid(box_domain, 10.0)
    opts = IndexOptions(thresholds=(0.0, 3.0), grid_km=10.0, sims=0, min_casts=20,
                        variogram="exponential")
    t = compute_indices(_qc(df), box_domain, grid, opts).table.set_index("year")
    assert t.loc[2001, "surface_mean_c"] == pytest.approx(t.loc[2001, "bottom_mean_c"] + 3.0,
                                                          abs=0.02)
    total = grid.active_area().sum()
    for lab in ("0", "3"):
        assert t.loc[2001, f"surface_below_{lab}c_km2"] + t.loc[2001, f"surface_above_{lab}c_km2"] \
            == pytest.approx(total)
    # Surface below 3 degC is where the bottom is below 0 degC.
    assert t.loc[2001, "surface_below_3c_km2"] == pytest.approx(t.loc[2001, "below_0c_km2"],
                                                                rel=0.05)
    assert np.isnan(t.loc[2002, "surface_mean_c"])  # no surface casts: blank, not invented
    assert column_label("surface_above_3c_km2") == "sea-surface area above 3 °C (km²)"


def test_no_surface_columns_without_surface_values(box_domain):
    df = synthetic_casts(years=(2001,), n_side=9)
    opts = IndexOptions(thresholds=(0.0,), grid_km=10.0, sims=0, min_casts=20,
                        variogram="exponential")
    t = compute_indices(_qc(df), box_domain, make_grid(box_domain, 10.0), opts).table
    assert not [c for c in t.columns if c.startswith("surface_")]
