from coldindex.schema import (
    CASTS,
    area_column,
    indices_table,
    render_outputs_md,
    threshold_label,
)
from tests.conftest import ROOT


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
