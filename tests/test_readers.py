from pathlib import Path

import pandas as pd
import pytest

from coldindex.errors import ConfigError, InputError
from coldindex.io.readers import (
    read_casts,
    read_domain,
    read_ice,
    read_series,
    read_text_table,
    read_trajectories,
)
from coldindex.qc import run_qc

HEADER = "Yr;Lat;Lon;TempBottom\n"


def test_semicolon_latin1_and_mapping(tmp_path: Path):
    p = tmp_path / "casts.csv"
    p.write_bytes((HEADER + "2001;60,5;179.5;1.2\n").replace(",5", ".5").encode("latin-1")
                  + "2001;60.6;179.6;1.3;\n".replace(";\n", "\n").encode("latin-1"))
    df = read_casts(p, {"year": "Yr", "lat": "Lat", "lon": "Lon", "bottom_c": "TempBottom"})
    assert list(df.columns) == ["row", "year", "lat", "lon", "bottom_c"]
    assert df["row"].tolist() == [2, 3]  # as a spreadsheet shows them: the header is row 1
    assert df["bottom_c"].tolist() == ["1.2", "1.3"]


def test_latin1_fallback(tmp_path: Path):
    p = tmp_path / "c.csv"
    p.write_bytes("year,lat,lon,bottom_c,station\n2001,60,179,1.0,Ørn\n".encode("latin-1"))
    assert read_casts(p)["station"].iloc[0] == "Ørn"


def test_case_insensitive_default_names(tmp_path: Path):
    p = tmp_path / "c.csv"
    p.write_text("YEAR,Lat,LON,Bottom_C\n2001,60,179,1\n")
    assert read_casts(p)["year"].iloc[0] == "2001"


def test_parquet(tmp_path: Path):
    p = tmp_path / "c.parquet"
    pd.DataFrame({"year": [2001], "lat": [60.0], "lon": [179.0], "bottom_c": [None]}).to_parquet(p)
    df = read_casts(p)
    assert df["bottom_c"].iloc[0] == ""


@pytest.mark.parametrize("content, message", [
    (b"", "is empty"),
    (b"year,lat,lon,bottom_c\n", "header but no data rows"),
    (b"year,lat,lon\n2001,60,179\n", "has no column 'bottom_c'; map yours with --columns"),
    (b"\x00\x01\x02binary", "not a text table"),
])
def test_bad_files_name_the_file(tmp_path: Path, content: bytes, message: str):
    p = tmp_path / "bad.csv"
    p.write_bytes(content)
    with pytest.raises(InputError, match=message) as exc:
        read_casts(p)
    assert str(p) in str(exc.value)


def test_mapping_to_absent_header(tmp_path: Path):
    p = tmp_path / "c.csv"
    p.write_text("year,lat,lon,bottom_c\n2001,60,179,1\n")
    with pytest.raises(InputError, match="no column 'Temp'"):
        read_casts(p, {"bottom_c": "Temp"})
    with pytest.raises(InputError, match="not a column of the casts table"):
        read_casts(p, {"colour": "year"})


def test_missing_file(tmp_path: Path):
    with pytest.raises(InputError, match="does not exist"):
        read_casts(tmp_path / "nope.csv")


def test_ice_mapping_option_named(tmp_path: Path):
    p = tmp_path / "ice.csv"
    p.write_text("year,month\n2001,1\n")
    with pytest.raises(InputError, match="--ice-columns"):
        read_ice(p)


def test_domain_geojson_errors(tmp_path: Path):
    p = tmp_path / "d.geojson"
    p.write_text("{not json")
    with pytest.raises(InputError, match="not valid GeoJSON"):
        read_domain(p)
    p.write_text('{"type": "Point", "coordinates": [0, 0]}')
    with pytest.raises(InputError, match="Polygon"):
        read_domain(p)


# --------------------------------------------------------------------------------------
# Regional exports: decimal commas, day-month order, spreadsheet row numbers
# --------------------------------------------------------------------------------------

DOT_ROWS = [("2019", "St Ærø", "60.52", "179.5", "1.25", "10.01.2019", "102.5"),
            ("2019", "Bø", "60.61", "-179.75", "-0.5", "23.01.2019", "98"),
            ("2019", "Kåre", "61.0", "179.05", "0.75", "02.02.2019", "110.25")]
EUROPEAN_HEAD = "year;station;lat;lon;bottom_c;date;depth_m\n"


def _european(tmp_path: Path, rows=DOT_ROWS, name: str = "export.csv") -> Path:
    """A semicolon Latin-1 export with decimal commas, as a European spreadsheet saves it."""
    body = "".join(";".join(v if i == 5 else v.replace(".", ",") for i, v in enumerate(r)) + "\n"
                   for r in rows)
    p = tmp_path / name
    p.write_bytes((EUROPEAN_HEAD + body).encode("latin-1"))
    return p


def test_decimal_comma_latin1_reads_like_the_dot_file(tmp_path: Path):
    comma = read_casts(_european(tmp_path))
    dot = tmp_path / "dot.csv"
    dot.write_text("year,station,lat,lon,bottom_c,date,depth_m\n" + "".join(
        ",".join(r[:5]) + ",2019-" + r[5][3:5] + "-" + r[5][:2] + "," + r[6] + "\n"
        for r in DOT_ROWS), encoding="utf-8")
    plain = read_casts(dot)
    pd.testing.assert_frame_equal(comma, plain)
    assert comma["station"].tolist() == ["St Ærø", "Bø", "Kåre"]
    assert comma["bottom_c"].tolist() == ["1.25", "-0.5", "0.75"]
    qc = run_qc(comma)
    assert set(qc.table["flag"]) == {"ok"}  # no row flagged non_numeric


def test_decimal_comma_given_explicitly_and_point_refused(tmp_path: Path):
    p = _european(tmp_path)
    assert read_casts(p, decimal=",")["lat"].tolist() == ["60.52", "60.61", "61.0"]
    dot = tmp_path / "dot.csv"
    dot.write_text("year;lat;lon;bottom_c\n2019;60.5;179.5;1.5\n")
    with pytest.raises(InputError, match=r"row 2: column 'lat' holds '60.5' with a decimal "
                                         r"point, but read.decimal says") as exc:
        read_casts(dot, decimal=",")
    from coldindex.config import flag_naming  # the same error on a command names the flag

    assert "but --decimal says" in exc.value.render(flag_naming)
    # "." leaves commas alone: quality control then flags them, as it flags any non-number
    assert read_casts(p, decimal=".")["lat"].iloc[0] == "60,52"
    with pytest.raises(ConfigError, match="read.decimal needs to be"):
        read_casts(p, decimal=";")


def test_thousands_points_with_a_decimal_comma(tmp_path: Path):
    p = tmp_path / "deep.csv"
    p.write_text("year;lat;lon;bottom_c;depth_m\n2019;60,5;179,5;1,5;1.234,5\n"
                 "2019;60,6;179,5;-1,25;987,0\n")
    assert read_casts(p)["depth_m"].tolist() == ["1234.5", "987.0"]
    alone = tmp_path / "alone.csv"  # 1.234 with no comma: a thousand or one and a bit
    alone.write_text("year;lat;lon;bottom_c;depth_m\n2019;60,5;179,5;1,5;1.234\n")
    with pytest.raises(InputError, match="row 2: column 'depth_m' holds '1.234'"):
        read_casts(alone)


def test_mixed_decimal_marks_refused_naming_row_and_column(tmp_path: Path):
    p = tmp_path / "mixed.csv"
    p.write_bytes("year;lat;lon;bottom_c\n2019;60,5;179,5;1,2\n2019;60,6;179,6;1.3\n"
                  "2019;60,7;179,7;1,4\n".encode("latin-1"))
    with pytest.raises(InputError) as exc:
        read_casts(p)
    msg = str(exc.value)
    assert str(p) in msg and "row 3: column 'bottom_c' holds '1.3'" in msg
    assert "mixes decimal commas and decimal points" in msg


def test_quoted_decimal_comma_in_comma_file(tmp_path: Path):
    p = tmp_path / "quoted.csv"
    p.write_text('year,lat,lon,bottom_c\n2019,"60,5","179,5","1,25"\n')
    with pytest.raises(InputError, match="row 2: column 'lat' holds '60,5', a quoted number "
                                         "with a comma in a comma-separated file"):
        read_casts(p)
    assert read_casts(p, decimal=",")["bottom_c"].tolist() == ["1.25"]
    unquoted = tmp_path / "unquoted.csv"
    unquoted.write_text("year,lat,lon,bottom_c\n2019,60,5,179,5,1,25\n")
    with pytest.raises(InputError, match="decimal comma splits"):
        read_casts(unquoted)


def test_stray_quoted_comma_among_points_is_flagged_not_refused(tmp_path: Path):
    # A comma file writes decimal points; a stray quoted "1,5" is no number, and its row
    # is flagged like any other non-number (the file is not refused for one value).
    p = tmp_path / "c.csv"
    p.write_text('year,lat,lon,bottom_c\n2001,60.5,179.5,1.2\n2001,60.6,179.5,"1,5"\n')
    df = read_casts(p)
    assert df["bottom_c"].tolist() == ["1.2", "1,5"]
    t = run_qc(df).table.set_index("row")
    assert t.loc[3, "flag"] == "non_numeric" and t.loc[2, "flag"] == "ok"


def test_decimal_comma_in_ice_trajectories_and_series(tmp_path: Path):
    ice = tmp_path / "ice.csv"
    ice.write_text("year;month;ice\n2001;1;5,25\n2001;2;6\n")
    assert read_ice(ice)["ice"].tolist() == ["5.25", "6"]
    traj = tmp_path / "traj.csv"
    traj.write_text("model;scenario;year;value\nAlpha;s1;2001;1,5\n")
    assert read_trajectories(traj)["value"].tolist() == ["1.5"]
    series = tmp_path / "series.csv"
    series.write_text("year;bottom_mean_c;bottom_mean_c_sd\n2001;1,5;0,25\n2002;-0,5;0,1\n")
    s = read_series(series, "bottom_mean_c")
    assert s["value"].tolist() == [1.5, -0.5] and s["sd"].tolist() == [0.25, 0.1]


def _dated(tmp_path: Path, dates: list[str], sep: str = ",") -> Path:
    p = tmp_path / "dated.csv"
    rows = [sep.join(["2019", f"S{i}", f"{60 + 0.1 * i:.1f}", "179.5", "1.0", d])
            for i, d in enumerate(dates)]
    p.write_text(sep.join(["year", "station", "lat", "lon", "bottom_c", "date"]) + "\n"
                 + "\n".join(rows) + "\n")
    return p


def test_day_first_detected_and_median_doy_right(tmp_path: Path):
    # 10.01.2019 is 10 January (day 10), not 1 October (day 274).
    p = _dated(tmp_path, ["10.01.2019", "11.01.2019", "13.01.2019"], sep=";")
    df = read_casts(p)
    assert df["date"].tolist() == ["2019-01-10", "2019-01-11", "2019-01-13"]
    qc = run_qc(df)
    assert qc.counts_by_year().loc[2019, "median_doy"] == 11


def test_month_first_detected(tmp_path: Path):
    p = _dated(tmp_path, ["01/10/2019", "01/13/2019 14:30", "2019-01-12", "1/9/2019 2:30 PM"])
    assert read_casts(p)["date"].tolist() == ["2019-01-10", "2019-01-13T14:30:00",
                                              "2019-01-12", "2019-01-09 2:30 PM"]
    qc = run_qc(read_casts(p)).table
    assert qc["flag"].eq("ok").all()


def test_ambiguous_dates_refused_with_one_sentence(tmp_path: Path):
    p = _dated(tmp_path, ["05.06.2019", "06.06.2019", "2019-06-07"])
    with pytest.raises(InputError) as exc:
        read_casts(p)
    from coldindex.config import flag_naming

    msg = exc.value.render(flag_naming)
    assert msg.startswith(f"{p}: every date in column 'date' (e.g. '05.06.2019', row 2)")
    assert "give the date format (--date-format, e.g. %d.%m.%Y" in msg
    assert msg.endswith(".") and msg.replace("e.g. ", "").count(". ") == 0  # one sentence
    with pytest.raises(InputError, match=r"date format \(read.date_format, e.g."):
        read_casts(p)  # the default spelling, the config key


def test_explicit_date_format_honoured(tmp_path: Path):
    p = _dated(tmp_path, ["05.06.2019", "06.06.2019"])
    assert read_casts(p, date_format="%d.%m.%Y")["date"].tolist() == ["2019-06-05",
                                                                       "2019-06-06"]
    assert read_casts(p, date_format="%m.%d.%Y")["date"].tolist() == ["2019-05-06",
                                                                       "2019-06-06"]
    with pytest.raises(InputError, match=r"row 2: column 'date' holds '05.06.2019', which "
                                         r"does not follow the date format '%Y-%m-%d'"):
        read_casts(p, date_format="%Y-%m-%d")


@pytest.mark.parametrize("dates, needle", [
    (["25.01.2019", "01.25.2019"], "'25.01.2019' (row 2, day first) and '01.25.2019' (row 3"),
    (["25.01.2019", "31.02.2019"], "row 3: column 'date' holds '31.02.2019', which is not a "
                                   "date when read day first"),
    (["25.01.19"], "row 2: column 'date' holds '25.01.19', a date with a two-digit year"),
    (["25.01.2019 26:10"], "row 2: column 'date' holds '25.01.2019 26:10', which is not a "
                           "date"),
])
def test_odd_dates_refused(tmp_path: Path, dates: list[str], needle: str):
    with pytest.raises(InputError) as exc:
        read_casts(_dated(tmp_path, dates))
    assert needle in str(exc.value)


def test_row_numbers_are_spreadsheet_rows(tmp_path: Path):
    p = tmp_path / "c.csv"
    # a blank line and a quoted value spanning two lines: a spreadsheet shows rows 2, 4, 5
    p.write_text('year,lat,lon,bottom_c,station\n2001,60,179,1,A\n\n2001,61,179,1,"B\nC"\n'
                 "2001,62,179,1,D\n")
    assert read_casts(p)["row"].tolist() == [2, 4, 5]
    assert read_text_table(p).index.tolist() == [2, 4, 5]
    q = tmp_path / "c.parquet"
    pd.DataFrame({"year": [2001, 2002], "lat": [60.0, 61.0], "lon": [179.0, 179.0],
                  "bottom_c": [1.0, 2.0]}).to_parquet(q)
    assert read_casts(q)["row"].tolist() == [2, 3]


def test_row_numbers_reach_quality_control_messages(tmp_path: Path):
    p = tmp_path / "c.csv"
    p.write_text("year,lat,lon,bottom_c\n2001,60,179,1\n2001,61,179,abc\n")
    qc = run_qc(read_casts(p)).table.set_index("row")
    assert qc.loc[3, "flag"] == "non_numeric" and qc.loc[2, "flag"] == "ok"
    series = tmp_path / "s.csv"
    series.write_text("year,v\n2001,1\n2002,x\n")
    with pytest.raises(InputError, match="row 3: column 'v' needs a finite number"):
        read_series(series, "v")


@pytest.mark.parametrize("month", ["13", "0", "1.5", "Jan", ""])
def test_month_outside_1_to_12_refused(tmp_path: Path, month: str):
    p = tmp_path / "ice.csv"
    p.write_text(f"year,month,ice\n2001,1,5\n2001,{month},5\n")
    with pytest.raises(InputError, match=f"row 3: column 'month' holds '{month}', not a "
                                         "calendar month 1..12"):
        read_ice(p)


def test_profile_long_table_with_decimal_commas_and_day_first_times(tmp_path: Path):
    from coldindex.io.profiles import read_profiles

    p = tmp_path / "profiles.csv"
    p.write_bytes(("cast;time;lat;lon;temperature_c;depth_m\n"
                   "K1;13.07.2019 06:30;60,5;179,5;2,5;10\n"
                   "K1;13.07.2019 06:30;60,5;179,5;1,25;50,5\n"
                   "K2;02.07.2019;60,6;179,5;3;10\n").encode("latin-1"))
    data = read_profiles(p)
    assert data.casts["time"].dt.strftime("%Y-%m-%d %H:%M").tolist() == ["2019-07-13 06:30",
                                                                         "2019-07-02 00:00"]
    assert data.samples["depth_m"].tolist() == [10.0, 50.5, 10.0]
    assert data.samples["temperature_c"].tolist() == [2.5, 1.25, 3.0]
