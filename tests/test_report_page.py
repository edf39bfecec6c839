"""Report helpers, the CF time coordinate of fields.nc and the covariates added by issue 16."""

from html.parser import HTMLParser

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from coldindex.covariates import region_slug, with_class_probabilities, with_region_columns
from coldindex.domain import make_grid
from coldindex.io.writers import fields_dataset, survey_times
from coldindex.report.figures import maps_figure, stop_year_figure
from coldindex.report.page import (
    Section,
    column_label,
    details_table,
    median_date,
    methods_paragraph,
    render_page,
)


def test_time_coordinate_is_median_date_bounded_by_first_and_last(box_domain, tmp_path):
    grid = make_grid(box_domain, 20.0)
    m = int(grid.mask.sum())
    casts = pd.DataFrame({"year": [2001, 2001, 2001, 2002], "lat": 60.5, "lon": 179.0,
                          "bottom_c": 1.0,
                          "date": ["2001-01-10", "2001-02-03", "2001-01-20", ""]})
    ds = fields_dataset([2001, 2002], np.zeros((2, m)), np.ones((2, m)), [0.0], grid,
                        box_domain, casts)
    ds.to_netcdf(tmp_path / "f.nc")
    with xr.open_dataset(tmp_path / "f.nc") as back:
        assert back["time"].attrs["bounds"] == "time_bnds"
        assert back["time"].attrs["standard_name"] == "time"
        assert str(back["time"].values[0])[:10] == "2001-01-20"  # the median of three dates
        assert [str(v)[:10] for v in back["time_bnds"].values[0]] == ["2001-01-10",
                                                                       "2001-02-03"]
        assert np.isnat(back["time"].values[1])  # no date: missing, never invented
    t, b = survey_times([2001], casts.iloc[:2])
    # 2001-01-01 is day 11323 since 1970 (31 years, 8 of them leap): Jan 10 = 11332, Feb 3 = 11356.
    assert t[0] == pytest.approx((11332 + 11356) / 2)
    assert b[0].tolist() == [11332.0, 11356.0]


def test_column_labels_are_plain_words_with_units():
    assert column_label("below_2c_km2") == "area below 2 °C (km²)"
    assert column_label("below_m1p5c_km2") == "area below -1.5 °C (km²)"
    assert column_label("bottom_mean_c") == "mean bottom temperature (°C)"


def test_details_table_hides_nothing():
    df = pd.DataFrame({"year": range(2000, 2030), "v": np.arange(30.0)})
    html = details_table(df, "survey years", shown=5)
    assert "<details>" in html and "All 30 survey years" in html
    assert html.count("<tr>") == 1 + 5 + 1 + 30  # heads and rows of both tables
    assert "<details>" not in details_table(df.head(4), "survey years", shown=5)


def test_methods_name_only_the_stages_that_ran():
    text = methods_paragraph(["index", "shifts"], with_drift=False, with_sims=False,
                             with_regions=False, with_outliers=True)
    assert "STARS" in text and "Ordinary kriging" in text and "spatial-outlier" in text
    for absent in ("quantile delta mapping", "Bretherton", "circulant", "depth drift",
                   "regions"):
        assert absent not in text


def test_median_date_from_day_of_year():
    casts = pd.DataFrame({"year": [2025, 2025, 2025], "doy": [20.0, 24.0, 40.0]})
    assert median_date(casts, 2025) == "2025-01-24"
    assert median_date(casts.assign(doy=np.nan), 2025) is None


def test_page_escapes_sections_and_links_only_inside():
    bad = "<script>alert(1)</script>"
    page = render_page(bad, bad, bad, [bad], [Section("k", bad, [bad], "<p>ok</p>")], "")
    tags: list[str] = []

    class Collect(HTMLParser):
        def handle_starttag(self, tag, attrs):
            tags.append(tag)
            if tag == "a":
                assert dict(attrs)["href"] == "#k"

    Collect().feed(page)
    # <title>, <h1>, subtitle, cautions, headline, contents link, <h2>, paragraph: all text.
    assert "script" not in tags and page.count("&lt;script&gt;") == 8


def test_region_covariates_by_name_and_class_probabilities():
    ind = pd.DataFrame({"year": [2001, 2002, 2003], "bottom_mean_c": [1.0, 2.0, 3.0]})
    reg = pd.DataFrame({"year": [2001, 2002, 2001, 2002], "region": ["East south"] * 2 +
                        ["depth 0-50 m"] * 2, "bottom_mean_c": [0.5, 0.7, 1.5, 1.7],
                        "bottom_mean_c_sd": 0.1})
    wide, cols = with_region_columns(ind, reg, ("bottom_mean_c",))
    assert cols == ("bottom_mean_c", "east_south_bottom_mean_c", "depth_0_50_m_bottom_mean_c")
    assert wide["east_south_bottom_mean_c"].tolist()[:2] == [0.5, 0.7]
    assert np.isnan(wide["east_south_bottom_mean_c"].iloc[2])  # aligned by year, never shifted
    assert "east_south_bottom_mean_c_sd" in wide
    assert region_slug("2 deep") == "r_2_deep"
    classes = pd.DataFrame({"column": "bottom_mean_c", "year": [2001, 2003],
                            "p_cold": [0.2, 0.1], "p_average": [0.5, 0.3], "p_warm": [0.3, 0.6]})
    cov = with_class_probabilities(ind, classes)
    assert cov["bottom_mean_c_p_warm"].tolist()[0] == 0.3 and np.isnan(
        cov["bottom_mean_c_p_warm"].iloc[1])


def test_maps_and_stop_year_figures_draw(box_domain):
    grid = make_grid(box_domain, 20.0)
    field = grid.to_2d(np.linspace(-1, 3, int(grid.mask.sum())))
    fig = maps_figure([2001, 2002, 2003], np.stack([field] * 3), grid.x, grid.y, [], [
        np.zeros((0, 2))] * 3, 0.0, lon=grid.lon, lat=grid.lat,
        coastline=[np.array([[0.0, 0.0], [10.0, 10.0]])])
    texts = [t.get_text() for ax in fig.axes for t in ax.texts]
    assert any(t.endswith("km") for t in texts)  # the scale bar
    assert any("°N" in t for t in texts)  # graticule labels
    assert any("180°" == t for t in texts) or any("°E" in t or "°W" in t for t in texts)
    emergence = pd.DataFrame({"model": ["A", "B", "ensemble median"], "scenario": "s1",
                              "last_cold_year": [2070, 2090, np.nan],
                              "stop_year": [2060, np.nan, np.nan],
                              "state": ["stopped", "not_by_end", "undetermined"]})
    fig = stop_year_figure(emergence, 2100)
    lines = fig.axes[0].get_lines()
    assert any(list(ln.get_xdata()) == [2100.0] for ln in lines)  # censored at the end
    assert any(list(ln.get_xdata()) == [2060.0] for ln in lines)


def test_indices_paragraph_reports_the_timing_adjustment():
    from coldindex.report.page import indices_paragraphs

    ind = pd.DataFrame({"year": [2001, 2002], "bottom_mean_c": [1.0, 1.2],
                        "below_2c_km2": [100.0, 90.0], "timing_rate_c_per_day": [0.05, 0.04],
                        "timing_adjustment_c": [0.3, -0.25]})
    text = " ".join(indices_paragraphs(ind, (2.0,)))
    assert "moved the year's mean by -0.25 °C" in text and "+0.04 °C a day" in text
    assert "survey-day drift" in methods_paragraph(["index"], True, False, False, False, True)


def test_regions_paragraph_reports_the_area_outside():
    from coldindex.report.page import regions_paragraphs

    reg = pd.DataFrame({"year": 2001, "region": ["a", "b", "depth 0-50 m"],
                        "region_km2": [40.0, 50.0, 100.0], "bottom_mean_c": [1.0, 2.0, 1.5],
                        "below_2c_km2": [40.0, 10.0, 50.0]})
    text = " ".join(regions_paragraphs(reg, (2.0,), 100.0))
    assert "10 km² of the domain (10.0%) lies outside every region" in text
    assert "outside every depth zone" not in text
