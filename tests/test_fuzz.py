"""Fuzzing the readers through the CLI: odd files end in a clear error or flagged rows."""

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from typer.testing import CliRunner

from coldindex.cli import app
from tests.conftest import SAMPLE, synthetic_casts

runner = CliRunner()
HEADERS = ["year", "lat", "lon", "bottom_c", "station", "date", "depth_m", "salinity",
           "Year", "LAT", "x", "", "bottom_c", "ÿear", "temp"]
VALUES = ["", "NaN", "nan", "inf", "-inf", "1e308", "-1e308", "-9999", "abc", "61.2",
          "179.9", "-179.9", "2001", "2001.5", "0", "-2.5", "25", "é", "  ", "1,5", '"q"',
          "2001-07-01", "not-a-date", "99999999999999999999"]


def outcome(args: list[str]) -> tuple[int, str]:
    result = runner.invoke(app, args)
    text = result.output + (result.stderr if result.stderr_bytes is not None else "")
    if result.exception is not None and not isinstance(result.exception, SystemExit):
        raise result.exception
    return result.exit_code, text


@settings(max_examples=80, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
@given(headers=st.lists(st.sampled_from(HEADERS), min_size=1, max_size=7),
       rows=st.lists(st.lists(st.sampled_from(VALUES), min_size=0, max_size=8), max_size=12),
       sep=st.sampled_from([",", ";", "\t", "|"]),
       encoding=st.sampled_from(["utf-8", "latin-1", "utf-16", "utf-8-sig"]),
       blank=st.booleans())
def test_generated_csvs_never_crash(tmp_path: Path, headers, rows, sep, encoding, blank):
    lines = [sep.join(headers)] + [sep.join(r) for r in rows]
    if blank:
        lines.insert(1, "")
    path = tmp_path / "fuzz.csv"
    try:
        path.write_bytes("\n".join(lines).encode(encoding))
    except UnicodeEncodeError:
        return
    code, text = outcome(["check", str(path)])
    assert code in (0, 2), text
    assert "Traceback" not in text


def test_generated_valid_header_with_odd_values(tmp_path: Path):
    rng = np.random.default_rng(0)
    rows = [[str(rng.choice(VALUES)) for _ in range(4)] for _ in range(300)]
    df = pd.DataFrame(rows, columns=["year", "lat", "lon", "bottom_c"])
    good = synthetic_casts().astype(str)[["year", "lat", "lon", "bottom_c"]]
    path = tmp_path / "mixed.csv"
    pd.concat([good, df]).to_csv(path, index=False)
    code, text = outcome(["check", str(path), "--out", str(tmp_path / "o")])
    assert code == 0, text
    qc = pd.read_csv(tmp_path / "o" / "qc.csv")
    assert len(qc) == len(good) + 300 and (qc["flag"] != "ok").sum() >= 250


@pytest.mark.parametrize("fraction", [0.0, 0.5, 0.97])
def test_truncated_netcdf_and_parquet(tmp_path: Path, fraction: float):
    casts = tmp_path / "casts.csv"
    synthetic_casts().to_csv(casts, index=False)
    bathy = tmp_path / "bathy.nc"
    data = (SAMPLE / "bathymetry.nc").read_bytes()
    bathy.write_bytes(data[: int(len(data) * fraction)])
    code, text = outcome(["index", str(casts), "--out", str(tmp_path / "o"), "--bathymetry",
                          str(bathy), "--min-casts", "20", "--sims", "0", "--grid-km", "20"])
    assert code == 2 and "Traceback" not in text
    assert "bathy.nc" in text
    assert not (tmp_path / "o" / "indices.csv").exists()
    pq = tmp_path / "casts.parquet"
    synthetic_casts().to_parquet(pq)
    raw = pq.read_bytes()
    pq.write_bytes(raw[: int(len(raw) * fraction)])
    code, text = outcome(["check", str(pq)])
    assert code == 2 and "casts.parquet" in text


def test_corrupted_fields_for_projection(tmp_path: Path):
    bad = tmp_path / "fields.nc"
    bad.write_bytes(b"CDF\x01" + b"\x00" * 100)
    obs = tmp_path / "obs.csv"
    obs.write_text("year,bottom_mean_c\n" + "".join(f"{2000 + i},{i * 0.1}\n" for i in range(20)))
    model = tmp_path / "model.nc"
    model.write_bytes(b"garbage")
    code, text = outcome(["project", str(model), "--observed", str(obs), "--value",
                          "bottom_mean_c", "--out", str(tmp_path / "o"), "--fields", str(bad)])
    assert code == 2 and "Traceback" not in text
