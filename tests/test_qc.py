import numpy as np
import pandas as pd
import pytest

from coldindex.errors import InputError
from coldindex.qc import freezing_point_c, run_qc, year_hashes


def raw(rows):
    df = pd.DataFrame(rows, columns=["year", "station", "lat", "lon", "bottom_c"]).astype(str)
    df = df.replace("None", "")
    df.insert(0, "row", np.arange(2, len(df) + 2))  # as the reader numbers them
    return df


GOOD = [("2001", f"S{i}", "60.5", str(179 + i * 0.1), "1.0") for i in range(5)]


def test_freezing_point_against_unesco_check_value():
    # Source: Fofonoff & Millard 1983, UNESCO Tech. Pap. Mar. Sci. 44 (freezing point check
    # value: S = 40, p = 500 dbar -> -2.588567 degC), as printed in the marelac R package's
    # sw_tfreeze documentation. TEOS-10 (IOC et al. 2010) and the UNESCO 1983 polynomial
    # are different fits (TEOS-10 from the Gibbs function); they agree to about 1 mK over
    # the oceanic range, hence a 2 mK tolerance.
    depth = -__import__("gsw").z_from_p(500.0, 45.0)
    tf = freezing_point_c(40.0, depth, 45.0, 0.0)
    assert tf == pytest.approx(-2.588567, abs=0.002)
    # Source: same marelac page, check values sw_tfreeze(S=30, p=0) = -1.638 degC.
    assert freezing_point_c(30.0, 0.0, 45.0, 0.0) == pytest.approx(-1.638, abs=0.002)


def test_flags_each_reason():
    rows = GOOD + [
        ("2001", "A", "60.5", "179.0", ""),          # missing
        ("2001", "B", "60.5", "179.0", "warm"),      # non_numeric
        ("2001", "C", "60.5", "179.0", "-9999"),     # sentinel
        ("2001", "D", "605.0", "179.0", "1.0"),      # lat out of range
        ("2001", "E", "60.5", "400", "1.0"),         # lon out of range
        ("2001", "F", "60.5", "179.0", "-2.5"),      # below freezing
        ("2001", "G", "60.5", "179.0", "25"),        # above max
    ]
    res = run_qc(raw(rows))
    flags = res.table.set_index("station")["flag"]
    assert flags["A"] == "missing"
    assert flags["B"] == "non_numeric"
    assert flags["C"] == "sentinel"
    assert flags["D"] == "lat_out_of_range"
    assert flags["E"] == "lon_out_of_range"
    assert flags["F"] == "below_freezing"
    assert flags["G"] == "above_max"
    assert len(res.casts) == 5
    assert len(res.table) == len(rows)  # never silently dropped


def test_duplicates_are_order_free():
    rows = GOOD + [GOOD[0], ("2001", "S1", "60.5", "179.1", "2.0")]
    a = run_qc(raw(rows))
    b = run_qc(raw(rows[::-1]))
    assert sorted(a.table["flag"]) == sorted(b.table["flag"])
    assert (a.table["flag"] == "duplicate_copy").sum() == 1
    assert (a.table["flag"] == "duplicate_conflict").sum() == 2
    pd.testing.assert_frame_equal(a.casts.drop(columns="row"), b.casts.drop(columns="row"))


def test_position_stands_for_station_when_absent():
    rows = [("2001", "", "60.5", "179.0", "1.0"), ("2001", "", "60.5001", "179.0001", "1.5")]
    res = run_qc(raw(rows))
    assert set(res.table["flag"]) == {"duplicate_conflict"}


def test_swapped_columns_refused_as_a_whole():
    rows = [("2001", f"S{i}", "179.5", "60.5", "1.0") for i in range(5)]
    with pytest.raises(InputError, match="latitude and longitude look swapped"):
        run_qc(raw(rows), source="casts.csv")


def test_outside_domain(box_domain):
    rows = [("2001", "in", "61.0", "180.0", "1.0"), ("2001", "out", "58.0", "180.0", "1.0")]
    res = run_qc(raw(rows), box_domain)
    assert res.table.set_index("station")["flag"]["out"] == "outside_domain"


def test_year_hashes_ignore_row_order_but_see_values():
    t1 = run_qc(raw(GOOD)).table
    t2 = run_qc(raw(GOOD[::-1])).table
    assert year_hashes(t1) == year_hashes(t2)
    changed = list(GOOD)
    changed[2] = ("2001", "S2", "60.5", "179.2", "1.1")
    assert year_hashes(run_qc(raw(changed)).table) != year_hashes(t1)


def _raw_dated(rows):
    df = pd.DataFrame(rows, columns=["year", "station", "lat", "lon", "bottom_c", "date"])
    df.insert(0, "row", range(2, len(df) + 2))
    return df


def test_named_stations_at_one_position_are_not_duplicates():
    # Two different named stations that round to the same 1 km cell: both kept.
    rows = [("2001", "T01-S01", "60.5", "179.0", "1.0", ""),
            ("2001", "T01-S02", "60.5001", "179.0001", "1.5", "")]
    assert set(run_qc(_raw_dated(rows)).table["flag"]) == {"ok"}


def test_repeat_casts_on_other_days_are_kept_same_day_are_duplicates():
    rows = [("2001", "A", "60.5", "179.0", "1.0", "2001-07-01"),
            ("2001", "A", "60.5", "179.0", "1.4", "2001-07-09"),  # a repeat visit: kept
            ("2001", "B", "61.0", "179.5", "2.0", "2001-07-02"),
            ("2001", "B", "61.0", "179.5", "2.3", "2001-07-02")]  # same day: conflict
    flags = run_qc(_raw_dated(rows)).table["flag"].tolist()
    assert flags == ["ok", "ok", "duplicate_conflict", "duplicate_conflict"]
    # Same date, different times: two casts, not duplicates.
    rows_t = [("2001", "B", "61.0", "179.5", "2.0", "2001-07-02T06:00"),
              ("2001", "B", "61.0", "179.5", "2.3", "2001-07-02T18:00")]
    assert set(run_qc(_raw_dated(rows_t)).table["flag"]) == {"ok"}


def test_unnamed_casts_on_the_same_day_at_one_position_are_duplicates():
    rows = [("2001", "", "60.5", "179.0", "1.0", "2001-07-01"),
            ("2001", "", "60.5001", "179.0001", "1.0", "2001-07-01"),
            ("2001", "", "60.5", "179.0", "1.7", "2001-07-05")]
    flags = run_qc(_raw_dated(rows)).table["flag"].tolist()
    # The first two differ only below 1 km and in the last digits: a conflict (values differ).
    assert flags[:2] == ["duplicate_conflict", "duplicate_conflict"] and flags[2] == "ok"


def test_duplicate_details_name_the_rows_a_spreadsheet_shows(tmp_path):
    from coldindex.io.readers import read_casts

    p = tmp_path / "casts.csv"
    p.write_text("year;station;lat;lon;bottom_c\n2001;A;60,5;179,5;1,0\n\n"
                 "2001;A;60,5;179,5;1,0\n2001;B;60,6;179,5;1,0\n2001;B;60,6;179,5;1,5\n")
    t = run_qc(read_casts(p)).table.set_index("row")
    assert t.loc[4, "flag"] == "duplicate_copy" and "identical to row 2" in t.loc[4, "detail"]
    assert t.loc[2, "flag"] == "ok"
    assert t.loc[5, "detail"].startswith("rows 5, 6 share station B")
