"""Shared fixtures: small synthetic surveys whose truth is known by construction."""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import settings
from shapely.geometry import Polygon

from coldindex.domain import domain_from_polygon

# CI runs the property tests with a fixed derivation of examples, so a green run repeats.
settings.register_profile("ci", derandomize=True, print_blob=True)
if os.environ.get("CI"):
    settings.load_profile("ci")

ROOT = Path(__file__).resolve().parents[1]
SAMPLE = ROOT / "sample_inputs"

# A small rectangular shelf straddling 180° (3° x 2°).
BOX_180 = Polygon([(178.5, 60.0), (-178.5, 60.0), (-178.5, 62.0), (178.5, 62.0)])


@pytest.fixture(scope="session")
def box_domain():
    return domain_from_polygon(BOX_180)


def synthetic_casts(lon0: float = 180.0, years=(2001, 2002, 2003), n_side: int = 9,
                    seed: int = 1, shift: float = 0.0) -> pd.DataFrame:
    """Casts on a regular lon/lat lattice over BOX_180 (rotated by ``lon0 - 180``).

    Bottom temperature is a smooth function of latitude plus small noise, so the
    cold area is known by construction.
    """
    rng = np.random.default_rng(seed)
    lons = np.linspace(-1.35, 1.35, n_side) + lon0
    lats = np.linspace(60.1, 61.9, n_side)
    rows = []
    for yr in years:
        for i, la in enumerate(lats):
            for j, lo in enumerate(lons):
                t = 2.0 * (la - 61.0) + shift + (yr - years[0]) * 0.3 + rng.normal(0, 0.05)
                lon = ((lo + 180) % 360) - 180
                rows.append({"year": yr, "station": f"S{i}{j}", "lat": round(la, 5),
                             "lon": round(lon, 5), "bottom_c": round(t, 4),
                             "date": f"{yr}-07-{1 + (i + j) % 20:02d}"})
    return pd.DataFrame(rows)


def write_csv(df: pd.DataFrame, path: Path, **kw) -> Path:
    df.to_csv(path, index=False, **kw)
    return path
