"""Regions and depth zones: exact area split, and indices that add up realization by realization."""

import numpy as np
import pandas as pd
import pytest

from coldindex.config import IndexOptions, parse_depth_zones
from coldindex.domain import make_grid
from coldindex.errors import InputError
from coldindex.indices import compute_indices
from coldindex.interpolate import weighted_summaries
from coldindex.qc import run_qc
from coldindex.regions import (
    combine,
    depth_zone_weights,
    node_weights,
    region_weights,
    regions_from_geojson,
)
from tests.conftest import synthetic_casts


def _feature(name, ring):
    return {"type": "Feature", "properties": {"name": name},
            "geometry": {"type": "Polygon", "coordinates": [ring]}}


# BOX_180 split at the antimeridian into a western and an eastern half, the eastern half
# again at 61 N; the regions reach past the domain, which clips them.
WEST = _feature("west", [[178.0, 59.5], [180.0, 59.5], [180.0, 62.5], [178.0, 62.5],
                         [178.0, 59.5]])
EAST_S = _feature("east south", [[-180.0, 59.5], [-178.0, 59.5], [-178.0, 61.0],
                                 [-180.0, 61.0], [-180.0, 59.5]])
EAST_N = _feature("east north", [[-180.0, 61.0], [-178.0, 61.0], [-178.0, 62.5],
                                 [-180.0, 62.5], [-180.0, 61.0]])


def _collection(*feats):
    return {"type": "FeatureCollection", "features": list(feats)}


def qc_casts(df):
    raw = df.astype(str)
    raw.insert(0, "row", np.arange(1, len(df) + 1))
    return run_qc(raw).casts


def test_region_weights_split_cells_exactly(box_domain):
    grid = make_grid(box_domain, 10.0)
    regs = regions_from_geojson(_collection(WEST, EAST_S, EAST_N), box_domain)
    rw = region_weights(grid, box_domain, regs)
    area = grid.active_area()
    # Cells cut by a region boundary are shared by area, like the domain's edge cells.
    assert np.allclose(rw.weights.sum(axis=0), area, rtol=1e-9)
    assert rw.outside_km2 == pytest.approx(0.0, abs=1e-6 * area.sum())
    assert ((rw.weights > 0).sum(axis=0) > 1).any()  # some cells really are split
    # The halves either side of 180 deg are of equal area by symmetry of the box.
    assert rw.weights[0].sum() == pytest.approx(rw.weights[1:].sum(), rel=1e-3)


def test_cells_outside_every_region_are_reported(box_domain):
    grid = make_grid(box_domain, 10.0)
    rw = region_weights(grid, box_domain, regions_from_geojson(_collection(WEST), box_domain))
    assert rw.outside_km2 == pytest.approx(grid.active_area().sum() / 2, rel=1e-3)


def test_overlapping_and_unnamed_regions_refused(box_domain):
    wide = _feature("wide", [[179.0, 59.5], [-179.0, 59.5], [-179.0, 62.5], [179.0, 62.5],
                             [179.0, 59.5]])
    with pytest.raises(InputError, match="'west' and 'wide' overlap"):
        regions_from_geojson(_collection(WEST, wide), box_domain)
    nameless = {**WEST, "properties": {}}
    with pytest.raises(InputError, match="feature 1 has no name"):
        regions_from_geojson(_collection(nameless), box_domain)
    with pytest.raises(InputError, match="names repeat"):
        regions_from_geojson(_collection(WEST, WEST), box_domain)


def test_parse_depth_zones():
    assert parse_depth_zones("0-50, 50-100,100-200") == ((0, 50), (50, 100), (100, 200))
    assert parse_depth_zones("") == ()
    for bad in ("0-50,40-100", "50-0", "a-b", "0-50-100"):
        with pytest.raises(ValueError, match="index.depth_zones needs"):
            parse_depth_zones(bad)


def test_depth_zones_whole_cells():
    depth = np.array([10.0, 49.9, 50.0, 120.0, 250.0, np.nan])
    area = np.array([1.0, 2.0, 3.0, 4.0, 5.0, 6.0])
    zw = depth_zone_weights(depth, area, parse_depth_zones("0-50,50-100,100-200"))
    assert zw.names == ("depth 0-50 m", "depth 50-100 m", "depth 100-200 m")
    assert zw.weights.sum(axis=1).tolist() == [3.0, 3.0, 4.0]
    assert zw.outside_km2 == 11.0  # the 250 m cell and the cell without depth


def test_node_weights_sum_cells_onto_blocks():
    w = np.array([[1.0, 2.0, 0.0, 4.0], [0.0, 1.0, 3.0, 0.0]])
    nw = node_weights(w, np.array([0, 0, 1, 1]), 2)
    assert nw.tolist() == [[3.0, 4.0], [1.0, 3.0]]
    assert node_weights(w, None, 4) is w or np.array_equal(node_weights(w, None, 4), w)
    # Means and areas of regions that cover the nodes add up to the whole.
    vals = np.random.default_rng(0).normal(0, 1, (50, 2))
    means, areas = weighted_summaries(vals, nw, [0.0, 1.0])
    whole = vals @ nw.sum(axis=0)
    assert np.allclose((means * nw.sum(axis=1)).sum(axis=1), whole)
    assert np.allclose(areas.sum(axis=1), np.stack(
        [(vals < t).astype(float) @ nw.sum(axis=0) for t in (0.0, 1.0)], axis=1))


@pytest.fixture(scope="module")
def region_run(box_domain):
    grid = make_grid(box_domain, 10.0)
    casts = qc_casts(synthetic_casts(years=(2001, 2002), n_side=9))
    regs = region_weights(grid, box_domain,
                          regions_from_geojson(_collection(WEST, EAST_S, EAST_N), box_domain))
    # Depth zones from a synthetic bathymetry deepening to the north (60 N: 20 m, 62 N: 220 m).
    depth = 20.0 + 100.0 * (grid.lat[grid.mask] - 60.0)
    zones = depth_zone_weights(depth, grid.active_area(), parse_depth_zones("0-100,100-300"))
    both = combine([regs, zones])
    opts = IndexOptions(thresholds=(0.0, 1.0), grid_km=10.0, sims=60, param_draws=3,
                        min_casts=20, variogram="exponential")
    return compute_indices(casts, box_domain, grid, opts, regions=both), grid, regs, zones


def test_regions_and_zones_add_up_in_every_realization(region_run):
    res, grid, regs, zones = region_run
    area = grid.active_area()
    assert set(res.draws) == {2001, 2002}
    for d in res.draws.values():
        assert d.region_areas.shape == (60, 5, 2)
        for part in (slice(0, 3), slice(3, 5)):  # the regions, then the depth zones
            # Areas below each threshold: the parts sum to the domain's, draw by draw.
            np.testing.assert_allclose(d.region_areas[:, part, :].sum(axis=1), d.areas,
                                       rtol=1e-9, atol=1e-6)
            # Means: the area-weighted mean of the parts is the domain mean, draw by draw.
            w = (regs if part.start == 0 else zones).weights.sum(axis=1)
            np.testing.assert_allclose(d.region_means[:, part] @ w / area.sum(), d.means,
                                       rtol=1e-9, atol=1e-9)
    # The long table: one row per year and region; regions' expected areas add up too.
    t = res.regions
    assert list(t["region"].unique()) == ["west", "east south", "east north", "depth 0-100 m",
                                          "depth 100-300 m"]
    assert len(t) == 2 * 5
    for yr, g in t.groupby("year"):
        dom = res.table.set_index("year").loc[yr]
        r = g.iloc[:3]
        assert r["below_0c_km2"].sum() == pytest.approx(dom["below_0c_km2"], rel=1e-9)
        assert r["below_1c_km2_map"].sum() == pytest.approx(dom["below_1c_km2_map"], rel=1e-9)
        assert (r["bottom_mean_c"] * r["region_km2"]).sum() / r["region_km2"].sum() == \
            pytest.approx(dom["bottom_mean_c"], abs=1e-9)
    # The field warms to the north: the northern half is warmer than the southern one.
    g = t[t["year"] == 2001].set_index("region")
    assert g.loc["east north", "bottom_mean_c"] > g.loc["east south", "bottom_mean_c"] + 0.5
    assert (g["bottom_mean_c_lo90"] < g["bottom_mean_c"]).all()


def test_outlier_flagged_alone_and_kept_out_of_the_refit(box_domain):
    df = synthetic_casts(years=(2001,), n_side=11)
    rng = np.random.default_rng(7)
    df["bottom_c"] = (df["bottom_c"] + rng.normal(0.0, 0.3, len(df))).round(4)
    planted = 60  # an interior cast, raised by 2.5 degC (8 noise SDs)
    df.loc[planted, "bottom_c"] += 2.5
    casts = qc_casts(df)
    grid = make_grid(box_domain, 10.0)
    opts = IndexOptions(thresholds=(0.0,), grid_km=10.0, sims=0, min_casts=20,
                        variogram="exponential")
    res = compute_indices(casts, box_domain, grid, opts)
    assert res.outliers["row"].tolist() == [planted + 1]  # qc rows are 1-based
    assert res.outliers["z"].iloc[0] > 4.0
    row = res.table.iloc[0]
    assert row["n_casts"] == len(casts) - 1
    assert "1 spatial outlier kept out of the fit (|z| > 4)" in row["note"]
    assert planted + 1 not in set(res.casts["row"])
    # Off: nothing is flagged and the cross-validation error carries the planted cast.
    off = compute_indices(casts, box_domain, grid, IndexOptions(
        thresholds=(0.0,), grid_km=10.0, sims=0, min_casts=20, variogram="exponential",
        outlier_z=0.0))
    assert off.outliers.empty
    assert off.table["cv_rmse_c"].iloc[0] > row["cv_rmse_c"]


def test_no_outlier_in_a_clean_survey(box_domain):
    df = synthetic_casts(years=(2001, 2002), n_side=11)
    df["bottom_c"] = (df["bottom_c"] + np.random.default_rng(3).normal(0.0, 0.3, len(df))
                      ).round(4)
    opts = IndexOptions(thresholds=(0.0,), grid_km=10.0, sims=0, min_casts=20,
                        variogram="exponential")
    res = compute_indices(qc_casts(df), box_domain, make_grid(box_domain, 10.0), opts)
    assert res.outliers.empty
    assert isinstance(res.outliers, pd.DataFrame)


def test_index_cli_writes_regions_and_marks_outliers(tmp_path):
    import json

    import xarray as xr
    from typer.testing import CliRunner

    from coldindex.cli import app

    df = synthetic_casts(years=(2001, 2002), n_side=9)
    df.loc[40, "bottom_c"] += 3.0  # an interior cast of 2001, far off the smooth field
    casts = tmp_path / "casts.csv"
    df.to_csv(casts, index=False)
    regions = tmp_path / "regions.geojson"
    regions.write_text(json.dumps(_collection(WEST, EAST_S, EAST_N)))
    lon = np.linspace(178.0, 182.0, 41)  # 0..360 axis across 180 deg
    lat = np.linspace(59.5, 62.5, 31)
    depth = np.repeat((20.0 + 100.0 * (lat - 60.0))[:, None], len(lon), axis=1)
    xr.Dataset({"depth": (("lat", "lon"), depth)},
               coords={"lat": lat, "lon": lon}).to_netcdf(tmp_path / "bathy.nc")
    out = tmp_path / "out"
    result = CliRunner().invoke(app, [
        "index", str(casts), "--out", str(out), "--grid-km", "10", "--sims", "20",
        "--min-casts", "20", "--thresholds", "0", "--regions", str(regions),
        "--depth-zones", "0-100,100-150", "--bathymetry", str(tmp_path / "bathy.nc")])
    assert result.exit_code == 0, result.output
    assert "spatial outlier at station S44" in result.output
    # Zones 0-150 m leave the deepest cells (150-220 m) outside: reported.
    assert "lies outside every depth zone" in result.output
    reg = pd.read_csv(out / "regions.csv")
    assert list(reg.columns[:3]) == ["year", "region", "region_km2"]
    assert len(reg) == 2 * 5 and "below_0c_km2_lo90" in reg
    qc = pd.read_csv(out / "qc.csv")
    hit = qc[qc["flag"] == "spatial_outlier"]
    assert hit["row"].tolist() == [42] and "z = +" in hit["detail"].iloc[0]
    prov = json.loads((out / "provenance.json").read_text())
    assert "regions" in prov["inputs"] and "regions.csv" in prov["outputs"]


def test_index_cli_refuses_overlapping_regions_and_zones_without_depth(tmp_path):
    import json

    from typer.testing import CliRunner

    from coldindex.cli import app

    casts = tmp_path / "casts.csv"
    synthetic_casts(years=(2001,), n_side=9).to_csv(casts, index=False)
    regions = tmp_path / "regions.geojson"
    regions.write_text(json.dumps(_collection(WEST, {**WEST, "properties": {"name": "w2"}})))
    base = ["index", str(casts), "--out", str(tmp_path / "out"), "--grid-km", "10",
            "--sims", "0", "--min-casts", "20"]
    r = CliRunner().invoke(app, [*base, "--regions", str(regions)])
    assert r.exit_code != 0 and "overlap" in r.output
    r = CliRunner().invoke(app, [*base, "--depth-zones", "0-50"])
    assert r.exit_code != 0 and "--depth-zones needs the bathymetry" in r.output
    assert not (tmp_path / "out" / "indices.csv").exists()


def test_check_lists_the_planted_spatial_outlier(tmp_path):
    from typer.testing import CliRunner

    from coldindex.cli import app

    df = synthetic_casts(years=(2001, 2002), n_side=9)
    df["bottom_c"] = (df["bottom_c"] + np.random.default_rng(5).normal(0, 0.2, len(df))).round(3)
    df.loc[40, "bottom_c"] += 2.5  # station S44 of 2001
    casts = tmp_path / "casts.csv"
    df.to_csv(casts, index=False)
    r = CliRunner().invoke(app, ["check", str(casts), "--min-casts", "20", "--out",
                                 str(tmp_path / "qc")])
    assert r.exit_code == 0, r.output
    assert "spatial_outlier" in r.output
    qc = pd.read_csv(tmp_path / "qc" / "qc.csv")
    assert qc.loc[qc["flag"] == "spatial_outlier", "row"].tolist() == [42]
    r = CliRunner().invoke(app, ["check", str(casts), "--min-casts", "20", "--outlier-z", "0"])
    assert r.exit_code == 0 and "spatial_outlier" not in r.output


def test_coastline_lines_in_the_domain_plane(box_domain, tmp_path):
    from coldindex.io.readers import read_coastline
    from coldindex.regions import lines_from_geojson

    obj = {"type": "FeatureCollection", "features": [
        {"type": "Feature", "properties": {},
         "geometry": {"type": "LineString", "coordinates": [[179.0, 61.0], [-179.0, 61.0]]}},
        {"type": "Feature", "properties": {}, "geometry": WEST["geometry"]}]}
    lines = lines_from_geojson(obj, box_domain)
    assert len(lines) == 2 and lines[0].shape == (2, 2)
    # Across 180 deg the line stays short (about 108 km at 61 N), not round the globe.
    assert 90.0 < np.hypot(*(lines[0][1] - lines[0][0])) < 120.0
    with pytest.raises(InputError, match="holds no line or polygon"):
        lines_from_geojson({"type": "FeatureCollection", "features": []}, box_domain)
    bad = tmp_path / "coast.geojson"
    bad.write_text("{not json")
    with pytest.raises(InputError, match="inputs.coastline"):
        read_coastline(bad, box_domain)


def test_region_file_errors(box_domain, tmp_path):
    from coldindex.io.readers import read_regions

    with pytest.raises(InputError, match="no features"):
        regions_from_geojson({"type": "FeatureCollection", "features": []}, box_domain)
    point = {"type": "Feature", "properties": {"name": "p"},
             "geometry": {"type": "Point", "coordinates": [179.0, 61.0]}}
    with pytest.raises(InputError, match="not a Polygon"):
        regions_from_geojson(_collection(point), box_domain)
    flipped = _feature("flipped", [[61.0, 179.0], [62.0, 179.0], [62.0, 178.0], [61.0, 179.0]])
    with pytest.raises(InputError, match="latitudes outside"):
        regions_from_geojson(_collection(flipped), box_domain)
    bad = tmp_path / "regions.geojson"
    bad.write_text("[1, 2")
    with pytest.raises(InputError, match="--regions"):
        read_regions(bad, box_domain)
    with pytest.raises(InputError, match="region name"):
        regions_from_geojson(_collection({**WEST, "properties": {"name": "x" * 81}}),
                             box_domain)


def test_idw_regions_are_map_areas_and_an_empty_region_says_so(box_domain):
    from coldindex.regions import RegionWeights

    grid = make_grid(box_domain, 20.0)
    rw = region_weights(grid, box_domain,
                        regions_from_geojson(_collection(WEST, EAST_S, EAST_N), box_domain))
    empty = RegionWeights(names=("nowhere",), weights=np.zeros((1, rw.weights.shape[1])),
                          outside_km2=0.0)
    both = combine([rw, empty])
    casts = qc_casts(synthetic_casts(years=(2001,), n_side=9))
    opts = IndexOptions(thresholds=(0.0,), grid_km=20.0, sims=0, min_casts=20, method="idw")
    res = compute_indices(casts, box_domain, grid, opts, regions=both)
    t = res.regions.set_index("region")
    assert t.loc["west", "below_0c_km2"] == t.loc["west", "below_0c_km2_map"]
    assert t.iloc[:3]["below_0c_km2"].sum() == pytest.approx(
        res.table["below_0c_km2"].iloc[0], rel=1e-9)
    assert "holds no part of the domain" in t.loc["nowhere", "note"]
    assert np.isnan(t.loc["nowhere", "bottom_mean_c"])


def test_update_checks_regions_and_zones_at_the_door(tmp_path):
    from coldindex.config import config_from_mapping
    from coldindex.errors import ConfigError
    from coldindex.release import run_update

    (tmp_path / "casts.csv").write_text("year,lat,lon,bottom_c\n")
    cfg = config_from_mapping({"inputs": {"casts": "casts.csv", "regions": "missing.geojson"}},
                              tmp_path)
    with pytest.raises(ConfigError, match="inputs.regions names"):
        run_update(cfg, tmp_path / "out")
    with pytest.raises(ConfigError, match="index.depth_zones needs inputs.bathymetry"):
        config_from_mapping({"inputs": {"casts": "casts.csv"},
                             "index": {"depth_zones": "0-50"}}, tmp_path)
