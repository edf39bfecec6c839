"""The hostile battery: bad, absurd and malicious inputs to every command.

Every case runs the CLI in-process and asserts a non-zero exit code, exactly one
error sentence (one line starting ``Error:`` and ending with a full stop), no
traceback, and no output left behind; the update's release mechanics are attacked
with planted pointers, tampered releases, a held lock, failures injected into
writes (disk full, read-only file system, permission denied) and processes killed
at chosen moments.
"""

from __future__ import annotations

import errno
import json
import os
import shutil
import signal
import subprocess
import sys
import textwrap
import xml.etree.ElementTree as ET
from collections.abc import Callable
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

from coldindex.cli import app
from coldindex.io.files import load_config
from coldindex.io.writers import MANIFEST_NAME, sha256_file
from tests.conftest import BOX_180, ROOT, synthetic_casts

runner = CliRunner()

SCRIPT = "<script>alert(1)</script>"
BREAKOUT = '" onmouseover="alert(2)" x="'
MATHTEXT = r"$\frac{$"
MARKUP = "Temp[red]C [extra] [/x]"


# --------------------------------------------------------------------------------------
# Inputs: tiny and valid; each case spoils one thing.
# --------------------------------------------------------------------------------------

def _series(path: Path, n: int = 30) -> Path:
    rng = np.random.default_rng(5)
    years = np.arange(1990, 1990 + n)
    pd.DataFrame({"year": years, "median_doy": 190,
                  "bottom_mean_c": np.round(1.0 + rng.normal(0, 0.5, n), 3),
                  "bottom_mean_c_sd": 0.1,
                  "below_2c_km2": np.round(5e4 + rng.normal(0, 5e3, n), 1)}).to_csv(
        path, index=False)
    return path


def _ice(path: Path) -> Path:
    rng = np.random.default_rng(6)
    rows = [(y if m >= 11 else y + 1, m, round(5 + rng.normal(), 3))
            for y in range(1989, 2020) for m in (11, 12, 1, 2, 3, 4)]
    pd.DataFrame(rows, columns=["year", "month", "ice"]).to_csv(path, index=False)
    return path


def _traj(path: Path, models=("Alpha", "Beta"), scenario: str = "s1") -> Path:
    rng = np.random.default_rng(7)
    rows = [(m, scenario, "r1", y, round(1.0 + 0.03 * (y - 1990) + rng.normal(0, 0.2), 3))
            for m in models for y in range(1990, 2061)]
    pd.DataFrame(rows, columns=["model", "scenario", "member", "year", "value"]).to_csv(
        path, index=False)
    return path


def _cuts(path: Path, **over) -> Path:
    d = {"column": "bottom_mean_c", "low": 0.8, "high": 1.2, "rule": "given",
         "reference": None, "direction": "lower"}
    d.update(over)
    path.write_text(json.dumps(d))
    return path


def _domain(path: Path) -> Path:
    path.write_text(json.dumps({"type": "Feature", "properties": {},
                                "geometry": BOX_180.__geo_interface__}))
    return path


CONFIG = """
[inputs]
casts = "casts.csv"
domain = "domain.geojson"

[index]
thresholds = [0.0, 1.0]
grid_km = 20.0
sims = 2
min_casts = 20

[classify]
columns = ["bottom_mean_c", "below_0c_km2"]

[shifts]
method = "stars"
cutoff = 2
min_size = 2
boot = 9

[covariates]
columns = ["bottom_mean_c"]

[report]
map_years = 1
"""


def good_inputs(d: Path) -> Path:
    """Small valid inputs of every kind in ``d``: casts, domain, series, ice, trajectories."""
    synthetic_casts(years=(2001, 2002, 2003, 2004), n_side=6).to_csv(d / "casts.csv",
                                                                     index=False)
    _domain(d / "domain.geojson")
    _series(d / "series.csv")
    _ice(d / "ice.csv")
    _traj(d / "traj.csv")
    _cuts(d / "cuts.json")
    (d / "coldindex.toml").write_text(CONFIG)
    return d


@pytest.fixture(scope="module")
def good(tmp_path_factory) -> Path:
    return good_inputs(tmp_path_factory.mktemp("good"))


def invoke(args: list) -> tuple[int, str]:
    result = runner.invoke(app, [str(a) for a in args])
    if result.exception is not None and not isinstance(result.exception, SystemExit):
        raise result.exception  # a traceback: the battery fails here
    return result.exit_code, result.output  # stdout and stderr, interleaved


def refused(code: int, text: str, *needles: str, exit_code: int | None = None) -> str:
    """Assert a refusal: non-zero exit, one error sentence, no traceback; return it."""
    assert code != 0, text
    if exit_code is not None:
        assert code == exit_code, text
    assert "Traceback" not in text
    errors = [ln for ln in text.splitlines() if ln.startswith("Error:")]
    assert len(errors) == 1, text
    sentence = errors[0].strip()
    assert sentence.endswith("."), sentence
    for n in needles:
        assert n in sentence, (n, sentence)
    return sentence


def left_behind(out: Path) -> list[str]:
    """Everything in an output folder but the update's lock file."""
    if not out.exists():
        return []
    return sorted(str(p.relative_to(out)) for p in out.rglob("*") if p.name != ".coldindex.lock")


# --------------------------------------------------------------------------------------
# Table 1: spoiled files, every input kind through every command that reads it.
# --------------------------------------------------------------------------------------

SERIES_HEAD = "year,median_doy,bottom_mean_c,bottom_mean_c_sd,below_2c_km2\n"


def _series_rows(bad_year: str = "", bad_value: str = "") -> str:
    rows = [f"{1990 + i},190,{1.0 + 0.1 * (i % 5):.2f},0.1,50000" for i in range(30)]
    if bad_year:
        rows[7] = f"{bad_year},190,1.0,0.1,50000"
    if bad_value:
        rows[7] = f"1997,190,{bad_value},0.1,50000"
    return SERIES_HEAD + "\n".join(rows) + "\n"


# name -> (file content or None for "missing" or "DIR" for a folder, needle in the message)
SERIES_SPOILS: dict[str, tuple[object, str]] = {
    "missing": (None, "does not exist"),
    "folder": ("DIR", "is a folder"),
    "empty": (b"", "is empty"),
    "header_only": (SERIES_HEAD.encode(), "no data rows"),
    "binary": (b"\x89PNG\x00\x00\x01binary", "not a text table"),
    "no_value_column": (b"year,other\n2001,1\n2002,2\n", "no column 'bottom_mean_c'"),
    "year_inf": (_series_rows(bad_year="inf").encode(), "whole year"),
    "year_1e25": (_series_rows(bad_year="1e25").encode(), "plausible years"),
    "year_2e9": (_series_rows(bad_year="2000000000").encode(), "plausible years"),
    "year_text": (_series_rows(bad_year="nineteen").encode(), "whole year"),
    "year_fraction": (_series_rows(bad_year="1997.5").encode(), "whole year"),
    "value_inf": (_series_rows(bad_value="inf").encode(), "finite number"),
    "value_minus_inf": (_series_rows(bad_value="-inf").encode(), "finite number"),
    "value_1e308": (_series_rows(bad_value="1e308").encode(), "plausible size"),
    "value_minus_1e308": (_series_rows(bad_value="-1e308").encode(), "plausible size"),
    "value_text": (_series_rows(bad_value="abc").encode(), "finite number"),
    "value_decimals_mixed": (_series_rows().replace(",", ";").replace(  # points, one comma
        "1997;190;1.20;", "1997;190;1,20;").encode(), "mixes decimal commas"),
    "all_blank": ((SERIES_HEAD + "".join(f"{1990 + i},190,,0.1,5\n" for i in range(30))).encode(),
                  "holds no value"),
    "duplicate_year": ((SERIES_HEAD + "2001,190,1,0.1,5\n2001,190,2,0.1,5\n").encode(),
                       "more than once"),
    "duplicate_header": (b"year,bottom_mean_c,bottom_mean_c\n2001,1,2\n2002,1,2\n",
                         "more than once"),
}


def _place(path: Path, content: object) -> None:
    if content is None:
        return
    if content == "DIR":
        path.mkdir()
        return
    assert isinstance(content, bytes)
    path.write_bytes(content)


def _series_commands(good: Path, bad: Path, out: Path) -> dict[str, list]:
    return {
        "classify": ["classify", bad, "--value", "bottom_mean_c", "--out", out],
        "shifts": ["shifts", bad, "--value", "bottom_mean_c", "--out", out, "--boot", "0"],
        "skill": ["skill", "--ice", good / "ice.csv", "--target", bad, "--value",
                  "bottom_mean_c", "--out", out],
        "project": ["project", good / "traj.csv", "--observed", bad, "--value",
                    "bottom_mean_c", "--out", out, "--adjust", "delta"],
    }


@pytest.mark.parametrize("command", ["classify", "shifts", "skill", "project"])
@pytest.mark.parametrize("spoil", list(SERIES_SPOILS))
def test_spoiled_series(good: Path, tmp_path: Path, command: str, spoil: str):
    content, needle = SERIES_SPOILS[spoil]
    bad = tmp_path / "series.csv"
    _place(bad, content)
    out = tmp_path / "out"
    code, text = invoke(_series_commands(good, bad, out)[command])
    refused(code, text, needle, "series.csv", exit_code=2)
    assert left_behind(out) == []


CASTS_HEAD = "year,lat,lon,bottom_c,station\n"
CASTS_SPOILS: dict[str, tuple[object, str]] = {
    "missing": (None, "does not exist"),
    "folder": ("DIR", "is a folder"),
    "empty": (b"", "is empty"),
    "header_only": (CASTS_HEAD.encode(), "no data rows"),
    "binary": (b"\x00\x01\x02PK binary", "not a text table"),
    "no_bottom_c": (b"year,lat,lon\n2001,60.5,179.5\n", "no column 'bottom_c'"),
    "swapped": ((CASTS_HEAD + "2001,179.5,60.5,1.0,A\n" * 5).encode(), "look swapped"),
    "duplicate_header": (b"year,lat,lon,bottom_c,bottom_c\n2001,60.5,179.5,1,2\n",
                         "more than once"),
    "all_years_absurd": ((CASTS_HEAD + "".join(
        f"2000000000,{60.2 + 0.01 * i},179.5,1.0,S{i}\n" for i in range(40))).encode(),
        "casts"),
    "all_values_1e308": ((CASTS_HEAD + "".join(
        f"2001,{60.2 + 0.01 * i},179.5,1e308,S{i}\n" for i in range(40))).encode(), "casts"),
    # Regional exports: decimal commas and day-month dates the reader cannot read safely.
    "decimals_mixed": (("year;lat;lon;bottom_c;station\n" + "".join(
        f"2001;60,{20 + i};179,5;1,0;S{i}\n" for i in range(30)) + "2001;60.6;179.5;1.0;T\n"
        ).encode("latin-1"), "mixes decimal commas and decimal points"),
    "decimal_comma_quoted": ((CASTS_HEAD + "".join(
        f'2001,"60,{20 + i}",179,1,S{i}\n' for i in range(30))).encode(), "quoted number"),
    "decimal_comma_unquoted": ((CASTS_HEAD + "".join(
        f"2001,60,{20 + i},179,5,1,0,S{i}\n" for i in range(30))).encode(),
        "more fields than the header"),
    "dates_ambiguous": (("year,lat,lon,bottom_c,station,date\n" + "".join(
        f"2001,{60.2 + 0.01 * i},179.5,1.0,S{i},0{1 + i % 9}.07.2001\n" for i in range(30))
        ).encode(), "cannot be told apart"),
    "dates_both_orders": ((b"year,lat,lon,bottom_c,station,date\n"
                           b"2001,60.2,179.5,1.0,A,25.07.2001\n"
                           b"2001,60.3,179.5,1.0,B,07/25/2001\n"), "month first"),
    "date_two_digit_year": ((b"year,lat,lon,bottom_c,station,date\n"
                             b"2001,60.2,179.5,1.0,A,25.07.01\n"), "two-digit year"),
    "date_impossible": ((b"year,lat,lon,bottom_c,station,date\n"
                         b"2001,60.2,179.5,1.0,A,25.07.2001\n"
                         b"2001,60.3,179.5,1.0,B,31.06.2001\n"), "not a date"),
}


@pytest.mark.parametrize("command", ["check", "index"])
@pytest.mark.parametrize("spoil", list(CASTS_SPOILS))
def test_spoiled_casts(good: Path, tmp_path: Path, command: str, spoil: str):
    content, needle = CASTS_SPOILS[spoil]
    bad = tmp_path / "casts.csv"
    _place(bad, content)
    out = tmp_path / "out"
    args = [command, bad, "--out", out, "--domain", good / "domain.geojson"]
    if command == "index":
        args += ["--sims", "0", "--grid-km", "20", "--min-casts", "20"]
    code, text = invoke(args)
    refused(code, text, needle, exit_code=2)
    if spoil.startswith("all_") and command == "check":
        assert left_behind(out) == ["complete.json", "qc.csv"]  # the flags, as asked
    else:
        assert left_behind(out) == []


def test_casts_dated_in_another_year_are_flagged(good: Path, tmp_path: Path):
    casts = synthetic_casts(years=(2001, 2002), n_side=6)
    casts.loc[3, "date"] = "1999-07-03"  # a typo of the year: not used, listed
    casts.loc[4, "date"] = "2000-12-20"  # a survey of 2001 that began in December: used
    path = tmp_path / "casts.csv"
    casts.to_csv(path, index=False)
    code, text = invoke(["check", path, "--out", tmp_path / "out", "--domain",
                         good / "domain.geojson", "--min-casts", "20"])
    assert code == 0, text
    qc = pd.read_csv(tmp_path / "out" / "qc.csv").set_index("row")  # spreadsheet rows
    assert qc.loc[5, "flag"] == "date_outside_year" and "1999-07-03" in qc.loc[5, "detail"]
    assert qc.loc[6, "flag"] == "ok"
    assert (qc["flag"] != "ok").sum() == 1


ICE_HEAD = "year,month,ice\n"


def _ice_rows(row: str) -> bytes:
    rows = [f"{y},{m},5.0" for y in range(1990, 2020) for m in (1, 2, 3)]
    rows[4] = row
    return (ICE_HEAD + "\n".join(rows) + "\n").encode()


ICE_SPOILS: dict[str, tuple[object, str]] = {
    "missing": (None, "does not exist"),
    "empty": (b"", "is empty"),
    "no_ice_column": (b"year,month\n2001,1\n", "no column 'ice'"),
    "year_2e9": (_ice_rows("2000000000,1,5.0"), "plausible years"),
    "year_inf": (_ice_rows("inf,1,5.0"), "year"),
    "ice_1e308": (_ice_rows("1991,2,1e308"), "plausible size"),
    "ice_inf": (_ice_rows("1991,2,inf"), "ice"),
    "month_13": (_ice_rows("1991,13,5.0"), "month"),
    "month_fraction": (_ice_rows("1991,2.5,5.0"), "calendar month 1..12"),
    "month_zero": (_ice_rows("1991,0,5.0"), "calendar month 1..12"),
    "ice_decimals_mixed": (("year;month;ice\n" + "".join(  # decimal commas, one point
        f"{y};{m};{'5.5' if (y, m) == (1991, 2) else '5,0'}\n"
        for y in range(1990, 2020) for m in (1, 2, 3))).encode("latin-1"),
        "mixes decimal commas"),
    "negative_ice": (_ice_rows("1991,2,-3"), "negative"),
    "duplicate_header": (b"year,month,ice,ice\n2001,1,2,3\n", "more than once"),
}


@pytest.mark.parametrize("spoil", list(ICE_SPOILS))
def test_spoiled_ice(good: Path, tmp_path: Path, spoil: str):
    content, needle = ICE_SPOILS[spoil]
    bad = tmp_path / "ice.csv"
    _place(bad, content)
    out = tmp_path / "out"
    code, text = invoke(["skill", "--ice", bad, "--target", good / "series.csv", "--value",
                         "bottom_mean_c", "--out", out])
    refused(code, text, needle, "ice.csv", exit_code=2)
    assert left_behind(out) == []


TRAJ_HEAD = "model,scenario,member,year,value\n"


def _traj_rows(row: str, model: str = "Alpha") -> bytes:
    rows = [f"{model},s1,r1,{y},1.0" for y in range(1990, 2061)]
    rows[3] = row
    return (TRAJ_HEAD + "\n".join(rows) + "\n").encode()


TRAJ_SPOILS: dict[str, tuple[object, str]] = {
    "missing": (None, "does not exist"),
    "empty": (b"", "is empty"),
    "no_value": (b"model,scenario,year\nA,s,2001\n", "no column 'value'"),
    "year_2e9": (_traj_rows("Alpha,s1,r1,2000000000,1.0"), "plausible years"),
    "year_1e25": (_traj_rows("Alpha,s1,r1,1e25,1.0"), "plausible years"),
    "value_1e308": (_traj_rows("Alpha,s1,r1,1993,1e308"), "plausible size"),
    "value_minus_inf": (_traj_rows("Alpha,s1,r1,1993,-inf"), "value"),
    "blank_model": (_traj_rows(",s1,r1,1993,1.0"), "blank"),
    "ensemble_name": (_traj_rows("ensemble median,s1,r1,1993,1.0", "ensemble median"),
                      "reserved"),
    "duplicate_header": (b"model,scenario,year,value,value\nA,s,2001,1,2\n", "more than once"),
    "value_decimals_mixed": ((TRAJ_HEAD.replace(",", ";") + "".join(  # points, one comma
        f"Alpha;s1;r1;{y};{'1,5' if y == 1993 else '1.0'}\n" for y in range(1990, 2061))
        ).encode(), "mixes decimal commas"),
}


@pytest.mark.parametrize("spoil", list(TRAJ_SPOILS))
def test_spoiled_trajectories(good: Path, tmp_path: Path, spoil: str):
    content, needle = TRAJ_SPOILS[spoil]
    bad = tmp_path / "traj.csv"
    _place(bad, content)
    out = tmp_path / "out"
    code, text = invoke(["project", bad, "--observed", good / "series.csv", "--value",
                         "bottom_mean_c", "--out", out, "--adjust", "delta"])
    refused(code, text, needle, "traj.csv", exit_code=2)
    assert left_behind(out) == []


def test_same_trajectory_file_twice(good: Path, tmp_path: Path):
    out = tmp_path / "out"
    link = tmp_path / "again.csv"
    os.link(good / "traj.csv", link)  # another name, the same inode
    for second in (good / "traj.csv", link):
        code, text = invoke(["project", good / "traj.csv", second, "--observed",
                             good / "series.csv", "--value", "bottom_mean_c", "--out", out])
        refused(code, text, "given twice", exit_code=2)
    assert left_behind(out) == []


CUTS_SPOILS: dict[str, tuple[str, str]] = {
    "low_text": ('{"column": "bottom_mean_c", "low": "abc", "high": 1, "rule": "given", '
                 '"reference": null, "direction": "lower"}', "finite number"),
    "low_nan": ('{"column": "bottom_mean_c", "low": NaN, "high": 1, "rule": "given", '
                '"reference": null, "direction": "lower"}', "finite number"),
    "high_inf": ('{"column": "bottom_mean_c", "low": 0, "high": Infinity, "rule": "given", '
                 '"reference": null, "direction": "lower"}', "finite number"),
    "low_above_high": ('{"column": "bottom_mean_c", "low": 3, "high": 1, "rule": "given", '
                       '"reference": null, "direction": "lower"}', "above"),
    "direction": ('{"column": "bottom_mean_c", "low": 0, "high": 1, "rule": "given", '
                  '"reference": null, "direction": "sideways"}', "direction"),
    "incomplete": ('{"column": "bottom_mean_c", "low": 0}', "lacks"),
    "other_column": ('{"column": "below_2c_km2", "low": 0, "high": 1, "rule": "given", '
                     '"reference": null, "direction": "higher"}', "not 'bottom_mean_c'"),
    "not_object": ("[1, 2]", "not a cuts object"),
    "truncated": ('{"column": "bottom_mean_c", "lo', "not valid JSON"),
    "nested": ("[" * 100000 + "]" * 100000, "not valid JSON"),
}


def _cuts_commands(good: Path, cuts: Path, out: Path) -> dict[str, list]:
    return {
        "classify": ["classify", good / "series.csv", "--value", "bottom_mean_c", "--out", out,
                     "--cuts", cuts],
        "skill": ["skill", "--ice", good / "ice.csv", "--target", good / "series.csv",
                  "--value", "bottom_mean_c", "--out", out, "--cuts", cuts],
        "project": ["project", good / "traj.csv", "--observed", good / "series.csv",
                    "--value", "bottom_mean_c", "--out", out, "--cuts", cuts],
    }


@pytest.mark.parametrize("command", ["classify", "skill", "project"])
@pytest.mark.parametrize("spoil", list(CUTS_SPOILS))
def test_spoiled_cuts(good: Path, tmp_path: Path, command: str, spoil: str):
    content, needle = CUTS_SPOILS[spoil]
    bad = tmp_path / "cuts.json"
    bad.write_text(content)
    out = tmp_path / "out"
    code, text = invoke(_cuts_commands(good, bad, out)[command])
    refused(code, text, needle, "cuts.json", exit_code=2)
    assert left_behind(out) == []


GLOBE = {"type": "Polygon", "coordinates": [[[-180, -89], [180, -89], [180, 89], [-180, 89],
                                             [-180, -89]]]}
DOMAIN_SPOILS: dict[str, tuple[str, str]] = {
    "not_json": ("{not json", "not valid GeoJSON"),
    "nested": ('{"a":' * 50000 + "1" + "}" * 50000, "nested too deeply"),
    "list": ("[1, 2, 3]", "not a GeoJSON object"),
    "point": ('{"type": "Point", "coordinates": [180, 61]}', "domain.geojson"),
    "globe": (json.dumps(GLOBE), "domain.geojson"),
}


@pytest.mark.parametrize("command", ["check", "index"])
@pytest.mark.parametrize("spoil", list(DOMAIN_SPOILS))
def test_spoiled_domain(good: Path, tmp_path: Path, command: str, spoil: str):
    content, needle = DOMAIN_SPOILS[spoil]
    bad = tmp_path / "domain.geojson"
    bad.write_text(content)
    out = tmp_path / "out"
    args = [command, good / "casts.csv", "--domain", bad, "--out", out]
    if command == "index":
        args += ["--sims", "0", "--grid-km", "20", "--min-casts", "20"]
    code, text = invoke(args)
    refused(code, text, needle, exit_code=2)
    assert left_behind(out) == []


# --------------------------------------------------------------------------------------
# Table 2: options out of bounds.
# --------------------------------------------------------------------------------------

OPTION_CASES: dict[str, tuple[str, list, str]] = {
    "index_seed_negative": ("index", ["--seed", "-1"], "--seed"),
    "index_thresholds_nan": ("index", ["--thresholds", "nan"], "--thresholds"),
    "index_thresholds_inf": ("index", ["--thresholds", "2,inf"], "--thresholds"),
    "index_thresholds_400": ("index", ["--thresholds", ",".join(
        str(0.01 * k) for k in range(400))], "at most 12"),
    "index_thresholds_text": ("index", ["--thresholds", "cold"], "--thresholds"),
    "index_thresholds_repeat": ("index", ["--thresholds", "1,1"], "distinct"),
    "index_grid_zero": ("index", ["--grid-km", "0"], "--grid-km"),
    "index_grid_nan": ("index", ["--grid-km", "nan"], "--grid-km"),
    "index_sims_negative": ("index", ["--sims", "-1"], "--sims"),
    "index_method": ("index", ["--method", "spline"], "--method"),
    "index_workers_negative": ("index", ["--workers", "-1"], "--workers"),
    "index_decimal": ("index", ["--decimal", ";"], "--decimal"),
    "index_date_format": ("index", ["--date-format", "dd.mm.yyyy"], "--date-format"),
    "classify_cut_nan": ("classify", ["--cut-values", "nan,nan"], "finite"),
    "classify_cut_inf": ("classify", ["--cut-values", "-inf,1"], "finite"),
    "classify_cut_order": ("classify", ["--cut-values", "2,1"], "LOW <= HIGH"),
    "classify_cut_text": ("classify", ["--cut-values", "low,high"], "--cut-values"),
    "classify_rule": ("classify", ["--rule", "sd:abc"], "--rule"),
    "classify_reference": ("classify", ["--reference", "2010-1990"], "--reference"),
    "classify_colder": ("classify", ["--colder", "up"], "--colder"),
    "skill_months_repeat": ("skill", ["--months", "1,1,1"], "without repeats"),
    "skill_months_13": ("skill", ["--months", "11-13"], "--months"),
    "skill_lags_500": ("skill", ["--lags", "0-500"], "at most 10 years"),
    "skill_lags_negative": ("skill", ["--lags", "-1"], "--lags"),
    "skill_confidence": ("skill", ["--confidence", "1.5"], "--confidence"),
    "project_window": ("project", ["--window", "0"], "--window"),
    "project_p_stop": ("project", ["--p-stop", "2"], "--p-stop"),
    "project_adjust": ("project", ["--adjust", "magic"], "--adjust"),
    "shifts_method": ("shifts", ["--method", "guess"], "--method"),
    "shifts_seed_negative": ("shifts", ["--seed", "-1"], "--seed"),
    "project_fields_not_netcdf": ("project", ["--fields", "SERIES"], "cannot be read as NetCDF"),
}


@pytest.mark.parametrize("case", list(OPTION_CASES))
def test_option_out_of_bounds(good: Path, tmp_path: Path, case: str):
    command, extra, needle = OPTION_CASES[case]
    out = tmp_path / "out"
    base = {
        "index": ["index", good / "casts.csv", "--out", out, "--domain", good / "domain.geojson",
                  "--sims", "0", "--grid-km", "20", "--min-casts", "20"],
        "classify": ["classify", good / "series.csv", "--value", "bottom_mean_c", "--out", out],
        "skill": ["skill", "--ice", good / "ice.csv", "--target", good / "series.csv",
                  "--value", "bottom_mean_c", "--out", out],
        "project": ["project", good / "traj.csv", "--observed", good / "series.csv", "--value",
                    "bottom_mean_c", "--out", out],
        "shifts": ["shifts", good / "series.csv", "--value", "bottom_mean_c", "--out", out],
    }[command]
    extra = [good / "series.csv" if a == "SERIES" else a for a in extra]
    code, text = invoke([*base, *extra])
    refused(code, text, needle, exit_code=2)
    assert left_behind(out) == []


# --------------------------------------------------------------------------------------
# Table 3: configurations refused before any work.
# --------------------------------------------------------------------------------------

CONFIG_CASES: dict[str, tuple[Callable[[str], str], str]] = {
    "unknown_key": (lambda c: c.replace("boot = 9", "boot = 9\nbootz = 1"), "shifts.bootz"),
    "unknown_table": (lambda c: c + "\n[extras]\nx = 1\n", "[extras]"),
    "not_toml": (lambda c: c + "\n[index\n", "not valid TOML"),
    "thresholds_nan": (lambda c: c.replace("[0.0, 1.0]", "[nan]"), "index.thresholds"),
    "thresholds_inf": (lambda c: c.replace("[0.0, 1.0]", "[0.0, inf]"), "index.thresholds"),
    "thresholds_13": (lambda c: c.replace("[0.0, 1.0]", str([0.1 * k for k in range(13)])),
                      "at most 12"),
    "tolerance_negative": (lambda c: c.replace("map_years = 1", "map_years = 1\ntolerance = -1"),
                           "report.tolerance"),
    "seed_negative": (lambda c: c.replace("min_casts = 20", "min_casts = 20\nseed = -1"),
                      "index.seed"),
    "shift_seed_negative": (lambda c: c.replace("boot = 9", "boot = 9\nseed = -5"),
                            "shifts.seed"),
    "months_repeat": (lambda c: c + '\n[skill]\nmonths = "1,1,1"\n', "skill.months"),
    "lags_500": (lambda c: c + '\n[skill]\nlags = "0-500"\n', "skill.lags"),
    "covariate_lag_50": (lambda c: c.replace('columns = ["bottom_mean_c"]',
                                             'columns = ["bottom_mean_c"]\nlags = [50]'),
                         "covariates.lags"),
    "grid_nan": (lambda c: c.replace("grid_km = 20.0", "grid_km = nan"), "index.grid_km"),
    "classify_column": (lambda c: c.replace('"below_0c_km2"]', '"below_5c_km2"]'),
                        "classify.columns"),
    "reference_backwards": (lambda c: c.replace("[covariates]",
                                                '[covariates]\nreference = "2010-2001"'),
                            "covariates.reference"),
    "rule_text": (lambda c: c.replace("[classify]", '[classify]\nrule = "sd:lots"'),
                  "classify.rule"),
    "casts_missing": (lambda c: c.replace('"casts.csv"', '"nope.csv"'), "inputs.casts"),
    "casts_twice": (lambda c: c.replace('domain = "domain.geojson"',
                                        'ice = "casts.csv"'), "same file"),
    "trajectories_twice": (lambda c: c.replace('domain = "domain.geojson"',
                                               'trajectories = ["traj.csv", "./traj.csv"]'),
                           "same file"),
    "wrong_type": (lambda c: c.replace("sims = 2", 'sims = "many"'), "index.sims"),
}


@pytest.mark.parametrize("case", list(CONFIG_CASES))
def test_config_refused_before_any_work(good: Path, tmp_path: Path, case: str):
    edit, needle = CONFIG_CASES[case]
    inputs = tmp_path / "in"
    shutil.copytree(good, inputs)
    (inputs / "coldindex.toml").write_text(edit(CONFIG))
    out = tmp_path / "out"
    code, text = invoke(["update", inputs / "coldindex.toml", "--out", out])
    refused(code, text, needle, exit_code=2)
    assert not out.exists()


def test_config_path_is_a_folder(good: Path, tmp_path: Path):
    code, text = invoke(["update", good, "--out", tmp_path / "out"])
    refused(code, text, "is a folder", exit_code=2)
    assert not (tmp_path / "out").exists()


# --------------------------------------------------------------------------------------
# Table 4: inputs are sacred; links are never followed.
# --------------------------------------------------------------------------------------

def _collision_args(good: Path, d: Path) -> dict[str, tuple[str, list]]:
    """Each command with one input placed under the name of one of its outputs in ``d``."""
    return {
        "check": ("qc.csv", ["check", d / "qc.csv", "--out", d]),
        "index": ("qc.csv", ["index", d / "qc.csv", "--out", d, "--sims", "0"]),
        "classify": ("classes.csv", ["classify", d / "classes.csv", "--value", "bottom_mean_c",
                                     "--out", d]),
        "classify_cuts": ("cuts.json", ["classify", good / "series.csv", "--value",
                                        "bottom_mean_c", "--out", d, "--cuts", d / "cuts.json"]),
        "shifts": ("shifts.csv", ["shifts", d / "shifts.csv", "--value", "bottom_mean_c",
                                  "--out", d]),
        "skill": ("skill.csv", ["skill", "--ice", good / "ice.csv", "--target",
                                d / "skill.csv", "--value", "bottom_mean_c", "--out", d]),
        "project": ("projection.csv", ["project", good / "traj.csv", "--observed",
                                       d / "projection.csv", "--value", "bottom_mean_c",
                                       "--out", d]),
    }


SOURCES = {"check": "casts.csv", "index": "casts.csv", "classify": "series.csv",
           "classify_cuts": "cuts.json", "shifts": "series.csv", "skill": "series.csv",
           "project": "series.csv"}


@pytest.mark.parametrize("how", ["same_path", "hard_link"])
@pytest.mark.parametrize("command", list(SOURCES))
def test_an_output_never_replaces_an_input(good: Path, tmp_path: Path, command: str, how: str):
    d = tmp_path / "d"
    d.mkdir()
    name, args = _collision_args(good, d)[command]
    if how == "same_path":
        shutil.copy(good / SOURCES[command], d / name)
    else:  # the input lives elsewhere; the output name is a hard link to it
        src = tmp_path / SOURCES[command]
        shutil.copy(good / SOURCES[command], src)
        os.link(src, d / name)
        args = [src if a == d / name else a for a in args]
    before = {p.name: sha256_file(p) for p in d.iterdir()}
    code, text = invoke(args)
    refused(code, text, "would overwrite the input", exit_code=3)
    assert {p.name: sha256_file(p) for p in d.iterdir()} == before  # nothing created


@pytest.mark.parametrize("name", ["classes.csv", "cuts.json", MANIFEST_NAME])
def test_a_link_in_the_output_folder_is_never_followed(good: Path, tmp_path: Path, name: str):
    victim = tmp_path / "victim.txt"
    victim.write_text("precious\n")
    out = tmp_path / "out"
    out.mkdir()
    (out / name).symlink_to(victim)
    code, text = invoke(["classify", good / "series.csv", "--value", "bottom_mean_c",
                         "--out", out])
    refused(code, text, "symbolic link", exit_code=3)
    assert victim.read_text() == "precious\n"
    assert sorted(p.name for p in out.iterdir()) == [name]


def test_inputs_inside_out_are_fine(good: Path, tmp_path: Path):
    out = tmp_path / "results"
    out.mkdir()
    shutil.copy(good / "series.csv", out / "indices.csv")
    digest = sha256_file(out / "indices.csv")
    for _ in range(2):  # and again, over its own outputs
        code, text = invoke(["classify", out / "indices.csv", "--value", "bottom_mean_c",
                             "--out", out])
        assert code == 0, text
    assert sha256_file(out / "indices.csv") == digest
    manifest = json.loads((out / MANIFEST_NAME).read_text())
    assert manifest["command"] == "classify"
    for name, h in manifest["outputs_sha256"].items():
        assert sha256_file(out / name) == h
    assert not [p for p in out.iterdir() if p.name.startswith(".")]


# --------------------------------------------------------------------------------------
# Table 5: failures injected into writes and into memory.
# --------------------------------------------------------------------------------------

ERRNOS = {"disk_full": (errno.ENOSPC, "disk is full"),
          "read_only": (errno.EROFS, "read-only"),
          "permission": (errno.EACCES, "permission denied")}


@pytest.mark.parametrize("command", ["check", "classify", "shifts"])
@pytest.mark.parametrize("kind", list(ERRNOS))
def test_write_failures_leave_the_old_outputs(good: Path, tmp_path: Path, monkeypatch,
                                              command: str, kind: str):
    out = tmp_path / "out"
    args = {"check": ["check", good / "casts.csv", "--out", out],
            "classify": ["classify", good / "series.csv", "--value", "bottom_mean_c",
                         "--out", out],
            "shifts": ["shifts", good / "series.csv", "--value", "bottom_mean_c", "--out", out,
                       "--boot", "0"]}[command]
    code, text = invoke(args)
    assert code == 0, text
    before = {p.name: sha256_file(p) for p in out.iterdir()}
    err, needle = ERRNOS[kind]
    real = os.replace

    def failing_replace(src, dst, *a, **k):
        if Path(dst).parent == out and Path(dst).name != MANIFEST_NAME:
            raise OSError(err, os.strerror(err), str(dst))
        return real(src, dst, *a, **k)

    monkeypatch.setattr(os, "replace", failing_replace)
    code, text = invoke([*args, *(["--cut-values", "0.5,1.5"] if command == "classify" else [])])
    refused(code, text, needle, exit_code=3)
    assert {p.name: sha256_file(p) for p in out.iterdir()} == before


def test_netcdf_failure_leaves_no_partial_set(good: Path, tmp_path: Path, monkeypatch):
    import xarray as xr

    def hdf_error(self, *a, **k):
        raise RuntimeError("NetCDF: HDF error")

    monkeypatch.setattr(xr.Dataset, "to_netcdf", hdf_error)
    out = tmp_path / "out"
    code, text = invoke(["index", good / "casts.csv", "--out", out, "--domain",
                         good / "domain.geojson", "--sims", "0", "--grid-km", "20",
                         "--min-casts", "20"])
    refused(code, text, "fields.nc", "NetCDF: HDF error", exit_code=3)
    assert left_behind(out) == []


def test_memory_error_becomes_a_sentence(good: Path, tmp_path: Path, monkeypatch):
    def no_memory(*a, **k):
        raise MemoryError

    monkeypatch.setattr("coldindex.classify.cuts_by_rule", no_memory)
    out = tmp_path / "out"
    code, text = invoke(["classify", good / "series.csv", "--value", "bottom_mean_c",
                         "--out", out])
    refused(code, text, "out of memory", exit_code=5)
    assert left_behind(out) == []


def test_memory_estimate_refuses_a_dense_year(tmp_path: Path):
    lat, lon = np.meshgrid(np.linspace(60.2, 61.8, 99), np.linspace(178.8, 181.2, 99))
    n = lat.size  # 9801 casts in one year: a dense survey on a ~1.5 km lattice
    rng = np.random.default_rng(0)
    df = pd.DataFrame({"year": 2001, "station": [f"S{k}" for k in range(n)],
                       "lat": np.round(lat.ravel(), 5), "lon": np.round(lon.ravel(), 5),
                       "bottom_c": np.round(rng.normal(1, 0.5, n), 3)})
    df.loc[df["lon"] > 180, "lon"] -= 360
    casts = tmp_path / "dense.csv"
    df.to_csv(casts, index=False)
    domain = _domain(tmp_path / "domain.geojson")
    out = tmp_path / "out"
    # The dense path maps such a year in bounded memory; 64 workers would each need one.
    code, text = invoke(["index", casts, "--out", out, "--domain", domain, "--sims", "0",
                         "--grid-km", "5", "--workers", "64"])
    refused(code, text, "2001 (9801 casts)", "with 64 worker(s)", "GB cap", exit_code=2)
    assert left_behind(out) == []


def test_messages_are_plain_text(tmp_path: Path):
    weird = tmp_path / f"{MARKUP}.csv"
    code, text = invoke(["classify", weird, "--value", "bottom_mean_c", "--out",
                         tmp_path / "[bold]out"])
    sentence = refused(code, text, MARKUP, exit_code=2)
    assert "does not exist" in sentence


# --------------------------------------------------------------------------------------
# Releases: one small real release, then attacks on it.
# --------------------------------------------------------------------------------------

@pytest.fixture(scope="module")
def release(tmp_path_factory, good: Path) -> tuple[Path, Path]:
    """A real update whose names carry markup: title, domain file, models, scenario, stations."""
    base = tmp_path_factory.mktemp("release")
    inputs = base / "in"
    shutil.copytree(good, inputs)
    casts = synthetic_casts(years=(2001, 2002, 2003, 2004), n_side=6)
    casts["station"] = casts["station"] + SCRIPT
    casts.to_csv(inputs / "casts.csv", index=False)
    hostile_domain = f"<img src=x onerror=alert(1)>{MATHTEXT}.geojson"
    (inputs / "domain.geojson").rename(inputs / hostile_domain)
    _traj(inputs / "traj.csv", models=(SCRIPT, BREAKOUT, MATHTEXT), scenario=MARKUP)
    cfg = CONFIG.replace('domain = "domain.geojson"',
                         f"domain = {json.dumps(hostile_domain)}\n"
                         'trajectories = ["traj.csv"]')
    cfg += "\n[project]\nadjust = \"none\"\nwindow = 3\n"
    cfg = cfg.replace("map_years = 1", f"map_years = 1\ntitle = {json.dumps(SCRIPT + BREAKOUT)}")
    (inputs / "coldindex.toml").write_text(cfg)
    out = base / "out"
    code, text = invoke(["update", inputs / "coldindex.toml", "--out", out])
    assert code == 0, text
    assert (out / "latest").read_text().strip() == "release-1"
    return inputs, out


ALLOWED_TAGS = {"html", "head", "meta", "title", "style", "body", "h1", "h2", "p", "ul", "li",
                "table", "thead", "tbody", "tr", "th", "td", "img", "code",
                # the report's structure: contents, sections, figures, disclosure elements
                "nav", "ol", "a", "section", "figure", "figcaption", "details", "summary",
                "div"}


def test_report_carries_no_injected_markup(release):
    _, out = release
    page = (out / "release-1" / "report.html").read_text(encoding="utf-8")
    tags: list[tuple[str, list]] = []
    texts: list[str] = []

    class Collect(HTMLParser):
        def handle_starttag(self, tag, attrs):
            tags.append((tag, attrs))

        def handle_data(self, data):
            texts.append(data)

    Collect().feed(page)
    assert {t for t, _ in tags} <= ALLOWED_TAGS
    for tag, attrs in tags:
        names = {a for a, _ in attrs}
        assert names <= {"lang", "charset", "class", "alt", "src", "id", "href", "name",
                         "content"}, (tag, attrs)
        if tag == "a":  # only links inside the page
            assert dict(attrs)["href"].startswith("#"), attrs
        if tag == "img":
            assert dict(attrs)["src"].startswith("data:image/png;base64,")
    joined = "".join(texts)
    for payload in (SCRIPT, "<img src=x onerror=alert(1)>", MATHTEXT):
        assert payload in joined  # shown as text, not as markup
    for svg in (out / "release-1" / "figures").glob("*.svg"):
        root = ET.parse(svg).getroot()
        for el in root.iter():
            assert not el.tag.endswith("script"), svg
            assert not [a for a in el.attrib if a.lower().startswith("on")], svg
    proj_svg = (out / "release-1" / "figures" / "projection.svg").read_text()
    assert "\\frac{" in proj_svg  # the model name drawn as written, not as mathtext


def _copy_out(release, tmp_path: Path) -> tuple[Path, Path]:
    inputs, out = release
    new = tmp_path / "out"
    shutil.copytree(out, new, symlinks=True)
    return inputs / "coldindex.toml", new


def _pointer_dotdot(out: Path) -> None:
    (out / "latest").write_text("../../somewhere\n")


def _pointer_folder(out: Path) -> None:
    (out / "latest").unlink()
    (out / "latest").mkdir()


def _pointer_link(out: Path) -> None:
    (out / "latest").unlink()
    (out / "latest").symlink_to(out / "release-1")


def _planted_release_link(out: Path) -> None:
    (out / "release-9").symlink_to(out / "release-1")
    (out / "latest").write_text("release-9\n")


def _provenance_truncated(out: Path) -> None:
    p = out / "release-1" / "provenance.json"
    p.write_bytes(p.read_bytes()[:100])


def _indices_deleted(out: Path) -> None:
    (out / "release-1" / "indices.csv").unlink()


def _indices_edited(out: Path) -> None:
    p = out / "release-1" / "indices.csv"
    p.write_text(p.read_text().replace("2002,", "2002,9", 1))


def _indices_truncated(out: Path) -> None:
    p = out / "release-1" / "indices.csv"
    p.write_bytes(p.read_bytes()[:-40])


def _frozen_damaged(out: Path) -> None:
    (out / "release-1" / "frozen.json").write_text('["not", "an", "object"]')


def _cuts_edited(out: Path) -> None:
    p = out / "release-1" / "cuts" / "bottom_mean_c.json"
    d = json.loads(p.read_text())
    d["low"], d["high"] = 99.0, 100.0  # every year would become "cold"
    p.write_text(json.dumps(d))


def _cuts_planted(out: Path) -> None:
    p = out / "release-1" / "cuts" / "below_0c_km2.json"
    p.unlink()
    _cuts(p, column="below_0c_km2", low=1e9, high=2e9, rule="tercile")


def _lock_link(out: Path) -> None:
    victim = out.parent / "victim.txt"
    victim.write_text("precious\n")
    if os.path.lexists(out / ".coldindex.lock"):
        (out / ".coldindex.lock").unlink()
    (out / ".coldindex.lock").symlink_to(victim)


def _format_changed(out: Path) -> None:
    p = out / "release-1" / "provenance.json"
    d = json.loads(p.read_text())
    d["release_format"] = 0
    p.write_text(json.dumps(d))


RELEASE_ATTACKS: dict[str, tuple[Callable[[Path], None], str, int]] = {
    "pointer_dotdot": (_pointer_dotdot, "trusts only its own releases", 2),
    "pointer_folder": (_pointer_folder, "latest is a folder", 3),
    "pointer_link": (_pointer_link, "latest is a symbolic link", 3),
    "planted_release_link": (_planted_release_link, "names 'release-9'", 2),
    "provenance_truncated": (_provenance_truncated, "provenance.json is damaged", 2),
    "indices_deleted": (_indices_deleted, "indices.csv is missing", 2),
    "indices_edited": (_indices_edited, "indices.csv does not match", 2),
    "indices_truncated": (_indices_truncated, "indices.csv does not match", 2),
    "frozen_damaged": (_frozen_damaged, "frozen.json does not match", 2),
    "cuts_edited": (_cuts_edited, "bottom_mean_c.json does not match", 2),
    "cuts_planted": (_cuts_planted, "below_0c_km2.json does not match", 2),
    "format_changed": (_format_changed, "incompatible release format", 2),
    "lock_link": (_lock_link, ".coldindex.lock is a symbolic link", 3),
}


@pytest.mark.parametrize("attack", list(RELEASE_ATTACKS))
def test_release_attacks_are_refused_before_any_work(release, tmp_path: Path, attack: str):
    cfg, out = _copy_out(release, tmp_path)
    spoil, needle, exit_code = RELEASE_ATTACKS[attack]
    spoil(out)
    before = sorted(p.name for p in out.iterdir())
    code, text = invoke(["update", cfg, "--out", out])
    refused(code, text, needle, exit_code=exit_code)
    assert sorted(p.name for p in out.iterdir()) == before
    assert not list(out.glob("release-2*")) and not list(out.glob(".release-*"))
    victim = out.parent / "victim.txt"
    assert not victim.exists() or victim.read_text() == "precious\n"


def test_symlinked_temporary_never_redirects_the_pointer(release, tmp_path: Path):
    """The old fixed name OUT/.latest.tmp planted as a link: ignored, the victim untouched."""
    cfg, out = _copy_out(release, tmp_path)
    victim = tmp_path / "victim.txt"
    victim.write_text("precious\n")
    (out / ".latest.tmp").symlink_to(victim)
    (out / ".release-2.partial").symlink_to(victim)  # a planted partial, too
    code, text = invoke(["update", cfg, "--out", out])
    assert code == 0, text
    assert victim.read_text() == "precious\n"
    assert (out / "latest").read_text() == "release-2\n" and not (out / "latest").is_symlink()
    prov = json.loads((out / "release-2" / "provenance.json").read_text())
    assert prov["previous_release"] == "release-1"
    assert oct((out / "release-2").stat().st_mode & 0o777) != oct(0o700)


def test_lost_pointer_is_recovered_by_scanning(release, tmp_path: Path):
    cfg, out = _copy_out(release, tmp_path)
    (out / "latest").unlink()
    from coldindex.io.releases import previous_release

    prev, notes = previous_release(out, None)
    assert prev == out / "release-1" and "missing" in notes[0]
    (out / "latest").write_text("release-7\n")  # names a release that is not there
    prev, notes = previous_release(out, None)
    assert prev == out / "release-1" and "not a complete release" in notes[0]


def test_second_update_refused_while_the_first_holds_the_lock(release, tmp_path: Path,
                                                              monkeypatch):
    cfg, out = _copy_out(release, tmp_path)
    monkeypatch.setattr("coldindex.io.releases.LOCK_WAIT_S", 0.2)
    holder = subprocess.Popen(
        [sys.executable, "-c", textwrap.dedent(f"""
            import sys, time
            from filelock import FileLock
            with FileLock({str(out / '.coldindex.lock')!r}):
                print("held", flush=True)
                time.sleep(30)
        """)], stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout is not None and holder.stdout.readline().strip() == "held"
        before = sorted(p.name for p in out.iterdir())
        code, text = invoke(["update", cfg, "--out", out])
        refused(code, text, "Another coldindex update", exit_code=4)
        assert sorted(p.name for p in out.iterdir()) == before
    finally:
        holder.kill()
        holder.wait()


KILLER = """
import os, signal, sys
from pathlib import Path
from coldindex import pipeline, release
from coldindex.io.files import load_config
from coldindex.io import writers

point = sys.argv[3]
if point == "mid-build":
    def die(*a, **k):
        os.kill(os.getpid(), signal.SIGKILL)
    pipeline.make_grid = die  # the index stage, after the partial folder exists
elif point == "before-pointer":
    real = writers.write_bytes
    def write_bytes(data, target):
        if target.name == "latest":
            os.kill(os.getpid(), signal.SIGKILL)
        return real(data, target)
    writers.write_bytes = write_bytes
release.run_update(load_config(Path(sys.argv[1])), Path(sys.argv[2]))
"""


def _kill_at(cfg: Path, out: Path, point: str) -> None:
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    proc = subprocess.run([sys.executable, "-c", KILLER, str(cfg), str(out), point],
                          capture_output=True, text=True, env=env, timeout=300)
    assert proc.returncode == -signal.SIGKILL, proc.stderr[-2000:]


def test_killed_updates_are_recovered(release, tmp_path: Path):
    from coldindex.release import run_update

    cfg, out = _copy_out(release, tmp_path)
    _kill_at(cfg, out, "mid-build")
    assert list(out.glob(".release-2.partial*")), "the kill should leave a partial folder"
    assert (out / "latest").read_text() == "release-1\n"
    run = run_update(load_config(cfg), out)  # cleans the partial, compares with release-1
    assert run.release.name == "release-2" and not list(out.glob(".release-*"))
    assert (out / "latest").read_text() == "release-2\n"
    _kill_at(cfg, out, "before-pointer")
    assert (out / "release-3" / "provenance.json").is_file()
    assert (out / "latest").read_text() == "release-2\n"
    from coldindex.io.releases import previous_release

    prev, notes = previous_release(out, None)  # what the next run compares with
    assert prev == out / "release-3"
    assert "release-3 is newer and complete" in notes[0]


# --------------------------------------------------------------------------------------
# Odds and ends: tiny series, init and demo targets, markup through the page builder.
# --------------------------------------------------------------------------------------

@pytest.mark.parametrize("n", [1, 2, 5])
@pytest.mark.parametrize("method", ["stars", "pelt", "both"])
def test_tiny_series_end_in_a_result_or_a_sentence(tmp_path: Path, n: int, method: str):
    path = _series(tmp_path / "tiny.csv", n)
    out = tmp_path / "out"
    code, text = invoke(["shifts", path, "--value", "bottom_mean_c", "--out", out,
                         "--method", method, "--boot", "9", "--cutoff", "2", "--min-size", "2"])
    if code == 0:
        assert {"shifts.csv", "regimes.csv", MANIFEST_NAME} <= {p.name for p in out.iterdir()}
    else:
        refused(code, text)
        assert left_behind(out) == []


def test_init_never_writes_through_a_link(tmp_path: Path):
    folder = tmp_path / "cfg"
    folder.mkdir()
    victim = tmp_path / "victim.txt"
    (folder / "coldindex.toml").symlink_to(victim)  # dangling: the victim does not exist yet
    code, text = invoke(["init", folder])
    refused(code, text, "symbolic link", exit_code=3)
    assert not victim.exists()
    (folder / "coldindex.toml").unlink()
    (folder / "coldindex.toml").write_text("mine\n")
    code, text = invoke(["init", folder])
    refused(code, text, "already exists", exit_code=3)
    assert (folder / "coldindex.toml").read_text() == "mine\n"


def test_demo_into_a_file_is_refused(tmp_path: Path):
    target = tmp_path / "taken"
    target.write_text("x")
    code, text = invoke(["demo", target, "--sims", "0", "--boot", "0"])
    refused(code, text, "is a file", exit_code=3)
    assert target.read_text() == "x"


def test_frozen_choices_of_an_index_folder_damaged(good: Path, tmp_path: Path):
    out = tmp_path / "out"
    out.mkdir()
    (out / "frozen.json").write_text('["a", "list"]')
    code, text = invoke(["index", good / "casts.csv", "--out", out, "--sims", "0",
                         "--grid-km", "20", "--min-casts", "20"])
    refused(code, text, "frozen.json is damaged", exit_code=2)
    assert sorted(p.name for p in out.iterdir()) == ["frozen.json"]


def test_a_model_with_no_value_is_refused():
    from coldindex.errors import InputError
    from coldindex.io.readers import check_trajectories

    traj = pd.DataFrame({"model": ["A"] * 3 + ["B"] * 3, "scenario": "s1",
                         "year": [2001, 2002, 2003] * 2,
                         "value": [1.0, 1.1, 1.2, np.nan, np.nan, np.nan]})
    with pytest.raises(InputError, match="model 'B' under scenario 's1' holds no finite value"):
        check_trajectories(traj, "gridded models")
    check_trajectories(traj[traj["model"] == "A"], "gridded models")  # a usable one passes


def test_page_builder_escapes_every_field():
    from coldindex.report.html import escape, render, table_html

    payloads = (SCRIPT, BREAKOUT, MATHTEXT, "{{figure:x}}")
    frame = pd.DataFrame({p: [p, 1.5] for p in payloads})
    page = render(" ".join(payloads), list(payloads),
                  [(p, f"<p>{escape(p)}</p>" + table_html(frame)) for p in payloads],
                  {"x": b"\x89PNG\r\n\x1a\n"}, " ".join(payloads), f"<p>{escape(SCRIPT)}</p>")
    tags: list[tuple[str, list]] = []
    texts: list[str] = []

    class Collect(HTMLParser):
        def handle_starttag(self, tag, attrs):
            tags.append((tag, attrs))

        def handle_data(self, data):
            texts.append(data)

    Collect().feed(page)
    assert {t for t, _ in tags} <= ALLOWED_TAGS
    assert all({a for a, _ in attrs} <= {"lang", "charset", "class"} for t, attrs in tags)
    assert not [t for t, _ in tags if t == "img"]  # "{{figure:x}}" from data stays text
    joined = "".join(texts)
    for p in payloads:
        assert joined.count(p) >= 4


def test_single_command_figures_draw_names_as_written(good: Path, tmp_path: Path):
    traj = _traj(tmp_path / "traj.csv", models=(MATHTEXT, SCRIPT), scenario=MATHTEXT)
    out = tmp_path / "out"
    code, text = invoke(["project", traj, "--observed", good / "series.csv", "--value",
                         "bottom_mean_c", "--out", out, "--adjust", "none"])
    assert code == 0, text
    assert (out / "projection.png").stat().st_size > 1000


SINGLE_KILLER = """
import os, signal, sys
from pathlib import Path
from coldindex.cli import main

out = Path(sys.argv[2])
real = os.replace
def replace(src, dst, *a, **k):
    real(src, dst, *a, **k)
    if Path(dst).parent == out and Path(dst).name == "classes.csv":
        os.kill(os.getpid(), signal.SIGKILL)  # one output replaced, the other not yet
os.replace = replace
sys.argv = ["coldindex", "classify", sys.argv[1], "--value", "bottom_mean_c", "--out",
            str(out), "--cut-values", sys.argv[3]]
main()
"""


def test_a_killed_single_command_leaves_a_detectably_incomplete_set(good: Path, tmp_path: Path):
    out = tmp_path / "out"
    code, text = invoke(["classify", good / "series.csv", "--value", "bottom_mean_c", "--out",
                         out, "--cut-values", "0.5,1.5"])
    assert code == 0 and (out / MANIFEST_NAME).is_file(), text
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    proc = subprocess.run([sys.executable, "-c", SINGLE_KILLER, str(good / "series.csv"),
                           str(out), "0.9,1.1"], capture_output=True, text=True, env=env,
                          timeout=300)
    assert proc.returncode == -signal.SIGKILL, proc.stderr[-2000:]
    assert not (out / MANIFEST_NAME).exists()  # the mixed set reads as incomplete
    code, text = invoke(["classify", good / "series.csv", "--value", "bottom_mean_c", "--out",
                         out, "--cut-values", "0.9,1.1"])
    assert code == 0, text
    manifest = json.loads((out / MANIFEST_NAME).read_text())
    assert {n: sha256_file(out / n) for n in manifest["outputs_sha256"]} == \
        manifest["outputs_sha256"]
    assert json.loads((out / "cuts.json").read_text())["low"] == 0.9
    assert not [p for p in out.iterdir() if p.name.startswith(".")]  # no staging left
