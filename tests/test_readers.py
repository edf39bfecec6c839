from pathlib import Path

import pandas as pd
import pytest

from coldindex.errors import InputError
from coldindex.io.readers import read_casts, read_domain, read_ice

HEADER = "Yr;Lat;Lon;TempBottom\n"


def test_semicolon_latin1_and_mapping(tmp_path: Path):
    p = tmp_path / "casts.csv"
    p.write_bytes((HEADER + "2001;60,5;179.5;1.2\n").replace(",5", ".5").encode("latin-1")
                  + "2001;60.6;179.6;1.3;\n".replace(";\n", "\n").encode("latin-1"))
    df = read_casts(p, {"year": "Yr", "lat": "Lat", "lon": "Lon", "bottom_c": "TempBottom"})
    assert list(df.columns) == ["row", "year", "lat", "lon", "bottom_c"]
    assert df["row"].tolist() == [1, 2]
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
