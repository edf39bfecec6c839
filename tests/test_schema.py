import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

from coldindex.io.writers import write_table
from coldindex.schema import (
    CASTS,
    HINDCAST,
    QC,
    area_column,
    covariates_layout,
    indices_table,
    output_table,
    render_outputs_md,
    threshold_label,
)
from tests.conftest import ROOT, SAMPLE


def test_threshold_labels_are_shortest_form():
    # Common practice, no single source: the guide's naming rule for thresholds.
    assert threshold_label(2) == "2"
    assert threshold_label(2.0) == "2"
    assert threshold_label(0) == "0"
    assert threshold_label(-0.0) == "0"
    assert threshold_label(-1) == "m1"
    assert threshold_label(1.5) == "1p5"
    assert threshold_label(-0.25) == "m0p25"
    assert area_column(2.0) == "below_2c_km2"


def test_indices_columns_follow_guide_order():
    names = indices_table([2, 0]).names
    assert names[:5] == ["year", "n_casts", "median_doy", "coverage", "bottom_mean_c"]
    assert names.index("below_2c_km2") < names.index("below_2c_km2_map")
    assert names[-2:] == ["variogram", "note"]
    assert "below_0c_km2_hi90" in names
    assert "below_0c_km2_sd" not in indices_table([0], with_sims=False).names


def test_column_names_are_identifiers():
    for name in CASTS.names + indices_table([1.5, -1]).names:
        assert name.isidentifier() and name == name.lower()


def test_outputs_doc_matches_schema():
    text = (ROOT / "docs" / "outputs.md").read_text(encoding="utf-8")
    assert text == render_outputs_md(), (
        "docs/outputs.md drifted from coldindex/schema.py; regenerate it with "
        "`python -m coldindex.schema > docs/outputs.md`")


# --------------------------------------------------------------------------------------
# The schema is the single source of the output columns
# --------------------------------------------------------------------------------------

def test_writer_refuses_an_undeclared_column(tmp_path):
    frame = pd.DataFrame({"year": [2001], "observed": [1.0], "predicted": [1.1],
                          "persistence": [0.9], "skill_guess": [0.5]})
    with pytest.raises(ValueError, match="undeclared column.*skill_guess"):
        write_table(frame, tmp_path / "hindcast.csv")
    with pytest.raises(ValueError, match="skill_guess"):
        write_table(frame, tmp_path / "other.csv", HINDCAST)
    assert not (tmp_path / "hindcast.csv").exists() and not (tmp_path / "other.csv").exists()
    with pytest.raises(ValueError, match="not a declared CSV output"):
        write_table(frame.drop(columns="skill_guess"), tmp_path / "notes.csv")


def test_writer_orders_by_the_schema_and_drops_internal_columns(tmp_path):

    frame = pd.DataFrame({"flag": ["ok"], "detail": [""], "doy": [190.0], "bottom_c": [1.0],
                          "lon": [179.5], "lat": [60.5], "station": ["A"], "year": [2001],
                          "row": [2], "date": ["2001-07-09"], "depth_m": [100.0]})
    write_table(frame, tmp_path / "qc.csv")
    assert (tmp_path / "qc.csv").read_text().splitlines()[0] == ",".join(QC.names)


def test_variable_layouts_follow_their_builders():
    names = indices_table([1.5, -1], with_sims=False).names
    assert output_table("indices.csv", names).names == names
    assert output_table("indices.csv", [*names, "surface_mean_c"]).get("surface_mean_c")
    cov = covariates_layout(["bottom_mean_c"], [1, 2], ["below_0c_km2"]).names
    assert cov[:6] == ["year", "bottom_mean_c", "bottom_mean_c_sd", "bottom_mean_c_lo90",
                       "bottom_mean_c_hi90", "bottom_mean_c_z"]
    assert cov[6:] == ["bottom_mean_c_lag1", "bottom_mean_c_z_lag1", "bottom_mean_c_lag2",
                       "bottom_mean_c_z_lag2", "below_0c_km2_p_cold", "below_0c_km2_p_average",
                       "below_0c_km2_p_warm"]
    written = [c for c in cov if not c.endswith(("_lo90", "_hi90", "_sd"))]
    assert output_table("covariates.csv", written).conform(
        pd.DataFrame(columns=written)).columns.tolist() == written


@pytest.fixture(scope="module")
def written(tmp_path_factory) -> tuple[Path, dict[str, str]]:
    """Every command run once on small inputs (the hostile battery's), its outputs kept."""
    from coldindex.cli import app
    from tests.test_hostile import good_inputs
    from tests.test_regions import EAST_N, EAST_S, WEST, _collection

    d = good_inputs(tmp_path_factory.mktemp("schema"))
    (d / "regions.geojson").write_text(json.dumps(_collection(WEST, EAST_S, EAST_N)))
    casts, dom = str(d / "casts.csv"), str(d / "domain.geojson")
    runs = {
        "check": ["check", casts, "--domain", dom, "--min-casts", "20"],
        "profiles": ["check", "--profiles", str(SAMPLE / "profiles.nc"), "--bathymetry",
                     str(SAMPLE / "bathymetry.nc"), "--domain", str(SAMPLE / "domain.geojson"),
                     "--show", "0"],
        "index": ["index", casts, "--domain", dom, "--min-casts", "20", "--sims", "2",
                  "--grid-km", "20", "--regions", str(d / "regions.geojson")],
        "classify": ["classify", str(d / "series.csv"), "--value", "bottom_mean_c"],
        "shifts": ["shifts", str(d / "series.csv"), "--value", "bottom_mean_c", "--boot", "9"],
        "skill": ["skill", "--ice", str(d / "ice.csv"), "--target", str(d / "series.csv"),
                  "--value", "bottom_mean_c"],
        "project": ["project", str(d / "traj.csv"), "--observed", str(d / "series.csv"),
                    "--value", "bottom_mean_c", "--adjust", "delta"],
        "ice": ["ice", str(SAMPLE / "ice_fields.nc"), "--regions",
                str(SAMPLE / "domain.geojson")],
        "update": ["update", str(d / "coldindex.toml")],
    }
    failed = {}
    for name, args in runs.items():
        result = CliRunner().invoke(app, [*args, "--out", str(d / f"out_{name}")])
        if result.exit_code != 0:
            failed[f"out_{name}"] = result.output  # failed there, reported by its outputs
    return d, failed


@pytest.mark.parametrize("output", [
    "out_check/qc.csv",
    "out_profiles/casts.csv", "out_index/qc.csv", "out_index/indices.csv",
    "out_index/regions.csv", "out_classify/classes.csv", "out_shifts/shifts.csv",
    "out_shifts/regimes.csv", "out_skill/skill.csv", "out_skill/hindcast.csv",
    "out_project/projection.csv", "out_project/emergence.csv", "out_ice/ice_fields.csv",
    "out_update/release-1/qc.csv", "out_update/release-1/indices.csv",
    "out_update/release-1/classes.csv", "out_update/release-1/shifts.csv",
    "out_update/release-1/regimes.csv", "out_update/release-1/covariates.csv",
    "out_update/release-1/revisions.csv"])
def test_every_output_has_the_declared_columns_in_declared_order(written, output: str):
    folder, failed = written
    run = output.split("/")[0]
    assert run not in failed, failed.get(run)
    path = folder / output
    columns = list(pd.read_csv(path, nrows=0).columns)
    layout = output_table(path.name, columns)
    assert [c for c in columns if c not in layout.names] == []  # nothing undeclared
    assert columns == [c for c in layout.names if c in columns]  # in declared order
    if path.name in ("qc.csv", "shifts.csv", "hindcast.csv", "ice_fields.csv"):
        assert columns == [c for c in layout.names if c != "column"]  # nothing left out
    assert np.all([c.isidentifier() and c == c.lower() for c in columns])
