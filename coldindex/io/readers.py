"""Readers: casts, ice and trajectory tables, domain polygons and bathymetry.

Tables are read as text first (UTF-8, then Latin-1), their delimiter sniffed,
headers mapped to ours (``ours=theirs``), and required columns checked; values
stay strings so that quality control can tell a blank from a non-number.

Regional exports are understood, never guessed: numbers written with a decimal
comma are rewritten with a point (detected, or given as ``decimal``), dates
written day and month in either order are rewritten year first (the order
detected from a day above 12, or given as ``date_format``), and a file that
leaves either open is refused in one sentence naming the option. Every row
carries ``row``, its number as a spreadsheet shows the file (header = row 1).
"""

from __future__ import annotations

import csv
import functools
import io
import json
import re
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from coldindex.domain import Domain, domain_from_geojson
from coldindex.errors import ColdindexError, ConfigError, InputError, os_error_sentence
from coldindex.schema import CASTS, ICE, TRAJECTORIES, Table

_DELIMITERS = ",;\t|"


OBSERVED_YEARS = (1800, 2300)  # Common practice, no single source: plausible survey years
TRAJECTORY_YEARS = (1800, 2500)  # model runs reach 2300 and beyond; 2500 is a generous cap
MAX_ABS_VALUE = 1e15  # larger magnitudes are corrupt data, not measurements (cap, no source)
SUMMARY_ROW_NAMES = ("ensemble median", "ensemble", "all", "summary")  # rows we add ourselves

DECIMAL_OPTION = ("read", "decimal")
"""The decimal-mark option: ``read.decimal`` in a config, ``--decimal`` on a command."""
DATE_FORMAT_OPTION = ("read", "date_format")
"""The date-format option: ``read.date_format`` in a config, ``--date-format`` on a command."""

FIRST_DATA_ROW = 2
"""Row number of the first data row: rows are numbered as a spreadsheet shows the file,
the header being row 1 (blank lines count, as a spreadsheet shows them)."""

# A number written with a decimal comma (``-1,25``, ``,5``, ``1,5E-3``, ``1.234,5`` with
# thousands points), and one written with a decimal point; plain integers are neither and
# read the same under both marks.
_COMMA_DECIMAL = re.compile(r"[-+]?(?:\d{1,3}(?:\.\d{3})+|\d*),\d+(?:[eE][-+]?\d+)?")
_POINT_DECIMAL = re.compile(r"[-+]?(?:\d+\.\d*|\.\d+)(?:[eE][-+]?\d+)?")
# Day and month in either order, a four-digit year, optionally a time: 10.01.2019,
# 1/10/2019 14:30, 10-01-2019T06:00:00, 1/10/2019 2:30 PM. ISO dates (year first) are not
# of this form.
_DAY_MONTH_YEAR = re.compile(r"(\d{1,2})([./-])(\d{1,2})\2(\d{4})((?:[ T]|, ?)\S.*)?")
_CLOCK = re.compile(r"[ T](\d{1,2}):(\d{2})(?::(\d{2}))?")
_TWO_DIGIT_YEAR = re.compile(r"\d{1,2}([./-])\d{1,2}\1\d{2}(?:[ T].*)?")
_TIME_DIRECTIVES = ("%H", "%I", "%M", "%S", "%X", "%c", "%T", "%p", "%f")


def _check_file(path: Path) -> None:
    try:
        if not path.exists():
            raise InputError(f"{path} does not exist; check the path.")
        if path.is_dir():
            raise InputError(f"{path} is a folder, not a file; give the file's path.")
        if path.stat().st_size == 0:
            raise InputError(f"{path} is empty; give a file with a header row and data rows.")
    except OSError as exc:
        raise InputError(os_error_sentence(exc, "reading", path)) from None


def _read_bytes(path: Path) -> bytes:
    try:
        return path.read_bytes()
    except OSError as exc:
        raise InputError(os_error_sentence(exc, "reading", path)) from None


def read_json(path: Path, advice: str, kind: str = "JSON") -> Any:
    """Read a JSON file, or refuse it in one sentence that ends with ``advice``.

    Parameters
    ----------
    path
        The file.
    advice
        What to give instead, e.g. ``"give one Polygon or MultiPolygon"``.
    kind
        What the file should be, for the message (``JSON``, ``GeoJSON``).

    Returns
    -------
    object
        The parsed JSON value.
    """
    _check_file(path)
    try:
        return json.loads(_read_bytes(path).decode("utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise InputError(f"{path} is not valid {kind} ({type(exc).__name__}); {advice}.") \
            from None
    except RecursionError:
        raise InputError(f"{path} is not valid {kind} (nested too deeply to be read); "
                         f"{advice}.") from None


def refuse_repeated_files(paths: Sequence[Path], what: str) -> None:
    """Refuse the same file given twice (same real path or inode), e.g. two model files."""
    from coldindex.io.files import same_file

    for i, p in enumerate(paths):
        for q in paths[:i]:
            if same_file(p, q):
                raise InputError(f"{what}: {p} is given twice (as {q}); give each file once, or "
                                 "its values would count twice.")


def _check_years(years: pd.Series, rows: pd.Series, path: object, col: str,
                 bounds: tuple[int, int]) -> None:
    bad = ~(years.between(*bounds)) & years.notna()
    if bad.any():
        r = rows[bad].iloc[0]
        raise InputError(f"{path}, row {r}: column {col!r} holds {years[bad].iloc[0]:g}, outside "
                         f"the plausible years {bounds[0]}..{bounds[1]}; fix the value.")


def _check_magnitude(values: pd.Series, rows: pd.Series, path: object, col: str) -> None:
    with np.errstate(invalid="ignore"):
        bad = values.notna() & ~(values.abs() <= MAX_ABS_VALUE)
    if bad.any():
        r = rows[bad].iloc[0]
        raise InputError(f"{path}, row {r}: column {col!r} holds {values[bad].iloc[0]!r}, which "
                         f"is not a finite value of plausible size (|x| <= {MAX_ABS_VALUE:g}); "
                         "fix or blank it.")


def _decode(path: Path, data: bytes) -> str:
    if b"\x00" in data[:65536]:
        raise InputError(f"{path} is not a text table (it holds binary data); give a CSV "
                         "file, or a Parquet file ending in .parquet.")
    try:
        return data.decode("utf-8-sig")
    except UnicodeDecodeError:
        return data.decode("latin-1")


def _sniff_delimiter(path: Path, text: str) -> str:
    lines = [ln for ln in text.splitlines() if ln.strip()][:50]
    header = lines[0] if lines else ""
    in_header = [d for d in _DELIMITERS if d in header]
    try:
        sep = csv.Sniffer().sniff("\n".join(lines), delimiters=_DELIMITERS).delimiter
    except csv.Error:
        if len(in_header) == 1:
            return in_header[0]
        if not in_header:
            return ","
        raise InputError(f"{path}: cannot tell the delimiter of the header row (it holds "
                         f"{' and '.join(repr(d) for d in in_header)}); save the file with "
                         "commas between columns.") from None
    # Decimal commas in the data rows may look like a delimiter; the header row has none.
    if sep not in header and len(in_header) == 1:
        return in_header[0]
    return sep


def _row_numbers(text: str, sep: str, n: int) -> np.ndarray:
    """Row numbers of the ``n`` data rows as a spreadsheet shows the file (header = row 1).

    Blank lines count (a spreadsheet shows them as empty rows) but hold no data; a
    quoted value spanning lines is one row.
    """
    try:
        records = csv.reader(io.StringIO(text), delimiter=sep, skipinitialspace=True)
        rows = [i for i, rec in enumerate(records, 1)
                if len(rec) > 1 or (len(rec) == 1 and rec[0].strip())]
    except csv.Error:  # pandas read it; numbering by position is the next best
        rows = []
    if len(rows) == n + 1:
        return np.asarray(rows[1:], dtype=int)
    return np.arange(FIRST_DATA_ROW, n + FIRST_DATA_ROW)


def _read_text(path: Path) -> tuple[pd.DataFrame, str]:
    _check_file(path)
    text = _decode(path, _read_bytes(path))
    if not text.strip():
        raise InputError(f"{path} is empty; give a file with a header row and data rows.")
    sep = _sniff_delimiter(path, text)
    try:
        df = pd.read_csv(io.StringIO(text), sep=sep, dtype=str, keep_default_na=False,
                         skip_blank_lines=True, skipinitialspace=True)
    except (pd.errors.ParserError, ValueError) as exc:
        detail = str(exc).strip()
    else:
        # Rows that all hold more fields than the header would silently become an index.
        detail = "" if isinstance(df.index, pd.RangeIndex) else \
            "the data rows hold more fields than the header"
    if detail:
        hint = (" (a number with a decimal comma splits into two fields unless quoted; save "
                "the file with semicolons between columns)" if sep == "," else "")
        raise InputError(f"{path} cannot be parsed as a table ({detail}); check that every "
                         f"row has as many fields as the header{hint}.")
    df.columns = [str(c).strip() for c in df.columns]
    first = next(ln for ln in text.splitlines() if ln.strip())
    header = next(csv.reader(io.StringIO(first), delimiter=sep))
    names = [h.strip() for h in header]
    dup = next((h for i, h in enumerate(names) if h and h in names[:i]), None)
    if dup is not None:
        raise InputError(f"{path}: the header {dup!r} appears more than once; rename or remove "
                         "the extra column.")
    if df.empty:
        raise InputError(f"{path} has a header but no data rows.")
    df.index = pd.Index(_row_numbers(text, sep, len(df)), name="row")
    return df.apply(lambda s: s.str.strip()), sep


def read_text_table(path: Path) -> pd.DataFrame:
    """Read a delimited text table as strings.

    Parameters
    ----------
    path
        CSV (or semicolon, tab or bar delimited) file.

    Returns
    -------
    pandas.DataFrame
        All values as stripped strings, blanks as ``""``; headers stripped; the index is
        each row's number as a spreadsheet shows it (header = row 1, so the first data
        row is 2).
    """
    return _read_text(path)[0]


def _read_parquet(path: Path) -> pd.DataFrame:
    try:
        df = pd.read_parquet(path)
    except Exception as exc:  # pyarrow raises many error types for damaged files
        raise InputError(f"{path} cannot be read as Parquet ({type(exc).__name__}); check "
                         "that the file is complete.") from None
    if df.empty:
        raise InputError(f"{path} has columns but no data rows.")
    out = pd.DataFrame(index=df.index)
    for col in df.columns:
        s = df[col]
        text = s.astype(str).where(s.notna(), "")
        out[str(col).strip()] = text.str.strip()
    # Numbered as the same table exported to CSV would be: header row 1, data from row 2.
    out.index = pd.Index(np.arange(FIRST_DATA_ROW, len(out) + FIRST_DATA_ROW), name="row")
    return out


def _naming(option: tuple[str, str]) -> Callable[[Callable[..., Any]], Callable[..., Any]]:
    """Errors of the wrapped reader that say ``{option}`` are about ``option``."""

    def decorate(func: Callable[..., Any]) -> Callable[..., Any]:
        @functools.wraps(func)
        def wrapper(*args: Any, **kwargs: Any) -> Any:
            try:
                return func(*args, **kwargs)
            except ColdindexError as exc:
                if exc.option is None and "{option}" in exc.message:
                    exc.option = option
                raise

        return wrapper

    return decorate


def _first_hit(df: pd.DataFrame, masks: Mapping[str, pd.Series]) -> tuple[int, str, str]:
    """Row number, column and value of the first row (by number) where a mask is true."""
    hits = [(int(m[m].index[0]), k, c) for k, (c, m) in enumerate(masks.items()) if m.any()]
    row, _, col = min(hits)  # the first row; in it, the leftmost column
    return row, col, str(df.at[row, col])


@_naming(DECIMAL_OPTION)
def decimal_marks(df: pd.DataFrame, columns: Sequence[str], path: object,
                  sep: str | None = None, decimal: str | None = None) -> pd.DataFrame:
    """Rewrite numbers written with a decimal comma (``1,5``) with a point (``1.5``).

    Parameters
    ----------
    df
        Values as strings, indexed by row number.
    columns
        The numeric columns (others are left alone).
    path
        The file, for messages.
    sep
        The file's delimiter (None for Parquet).
    decimal
        ``","`` or ``"."`` as given, or None to detect: numbers are read with a decimal
        comma when some are written ``-?d,d`` and none with a decimal point.

    Returns
    -------
    pandas.DataFrame
        A copy with comma decimals rewritten (unchanged with ``decimal="."``).

    Raises
    ------
    InputError
        A file (not comma-delimited) mixing decimal commas and points; a comma-delimited
        file whose numbers are all quoted with commas when the mark was not given (a
        quoted ``"1,234"`` may be a thousands separator; among decimal points such a value
        is left as it is, for quality control to flag); a decimal point in a file whose
        mark was given as a comma.
    """
    opt = "{option}"  # named by the caller's context (see _naming)
    if decimal not in (None, ".", ","):
        raise ConfigError(f"{opt} needs to be '.' or ',', got: {decimal!r}.")
    cols = [c for c in columns if c in df.columns]
    if decimal == "." or not cols:
        return df
    comma = {c: df[c].astype(str).str.fullmatch(_COMMA_DECIMAL) for c in cols}
    if not any(m.any() for m in comma.values()) and decimal is None:
        return df
    point = {c: df[c].astype(str).str.fullmatch(_POINT_DECIMAL) for c in cols}
    n_comma = sum(int(m.sum()) for m in comma.values())
    n_point = sum(int(m.sum()) for m in point.values())
    if decimal == "," and n_point:
        r, c, v = _first_hit(df, point)
        raise InputError(f"{path}, row {r}: column {c!r} holds {v!r} with a decimal point, "
                         f"but {opt} says the decimal mark is a comma; fix the value or the "
                         "option.")
    if decimal is None and n_point and sep == ",":
        # A comma-delimited file writes decimal points; a quoted "1,5" among them is no
        # number, and quality control flags its row like any other.
        return df
    if decimal is None and n_point:
        rare, common = (point, comma) if n_point <= n_comma else (comma, point)
        r, c, v = _first_hit(df, rare)
        r2, c2, v2 = _first_hit(df, common)
        raise InputError(f"{path}, row {r}: column {c!r} holds {v!r} while row {r2} (column "
                         f"{c2!r}) holds {v2!r}, so the file mixes decimal commas and decimal "
                         "points; write every number with the same decimal mark.")
    if decimal is None and sep == ",":
        r, c, v = _first_hit(df, comma)
        raise InputError(f"{path}, row {r}: column {c!r} holds {v!r}, a quoted number with a "
                         "comma in a comma-separated file, which may be a decimal comma or a "
                         f"thousands separator; give the decimal mark ({opt}, e.g. ',') or "
                         "save the file with semicolons between columns.")
    out = df.copy()
    for c, m in comma.items():
        if m.any():
            out.loc[m, c] = (out.loc[m, c].str.replace(".", "", regex=False)
                             .str.replace(",", ".", regex=False))
    return out


def _has_time(fmt: str) -> bool:
    return any(d in fmt for d in _TIME_DIRECTIVES)


@_naming(DATE_FORMAT_OPTION)
def normalise_dates(df: pd.DataFrame, columns: Sequence[str], path: object,
                    date_format: str | None = None) -> pd.DataFrame:
    """Rewrite the dates of ``columns`` year first (ISO 8601: ``YYYY-MM-DD[THH:MM:SS]``).

    Parameters
    ----------
    df
        Values as strings, indexed by row number.
    columns
        The date columns (others are left alone).
    path
        The file, for messages.
    date_format
        An explicit ``strptime`` format (e.g. ``"%d.%m.%Y"``) that every non-blank date must
        follow; None to detect. Detection: ISO dates (year first) are kept; dates written
        day, month and a four-digit year in either order, separated by ``.``, ``/`` or
        ``-``, are read day first when some first field exceeds 12 and month first when
        some second field does. Dot-separated dates are usually day first in Europe, but
        that is detected, not assumed.

    Returns
    -------
    pandas.DataFrame
        A copy with those dates rewritten; blanks and other forms left as they are.

    Raises
    ------
    InputError
        A date that does not follow ``date_format``; when detecting: every day and month
        12 or less (the order cannot be told), both orders present, a two-digit year, or a
        day or month out of range under the order found.
    """
    opt = "{option}"  # named by the caller's context (see _naming)
    out = df
    for col in (c for c in columns if c in df.columns):
        text = df[col].astype(str).str.strip()
        given = text.ne("")
        if not given.any():
            continue
        if date_format is not None:
            try:
                when = pd.to_datetime(text.where(given), format=date_format, errors="coerce")
            except (ValueError, TypeError) as exc:
                raise ConfigError(f"{opt} {date_format!r} is not a date format "
                                  f"({str(exc).strip()}); write it for strptime, e.g. "
                                  "%d.%m.%Y.") from None
            bad = given & when.isna()
            if bad.any():
                r = int(bad[bad].index[0])
                raise InputError(f"{path}, row {r}: column {col!r} holds {text[r]!r}, which "
                                 f"does not follow the date format {date_format!r} ({opt}); "
                                 "fix the value or the format.")
            iso = when.dt.strftime("%Y-%m-%dT%H:%M:%S" if _has_time(date_format)
                                   else "%Y-%m-%d")
        else:
            short = text.str.fullmatch(_TWO_DIGIT_YEAR)
            if short.any():
                r = int(short[short].index[0])
                raise InputError(f"{path}, row {r}: column {col!r} holds {text[r]!r}, a date "
                                 "with a two-digit year; write four-digit years or give the "
                                 f"date format ({opt}, e.g. %d.%m.%y).")
            parts = text.str.extract("^" + _DAY_MONTH_YEAR.pattern + "$")
            found = parts[0].notna()
            if not found.any():
                continue
            p = parts[found]
            first, second = p[0].astype(int), p[2].astype(int)
            day_first, month_first = first.gt(12), second.gt(12)
            if day_first.any() and month_first.any():
                r1, r2 = int(day_first[day_first].index[0]), int(month_first[month_first]
                                                                 .index[0])
                raise InputError(f"{path}: column {col!r} holds {text[r1]!r} (row {r1}, day "
                                 f"first) and {text[r2]!r} (row {r2}, month first); write "
                                 f"every date in one order or give the date format ({opt}, "
                                 "e.g. %d.%m.%Y).")
            if not (day_first.any() or month_first.any()):
                r = int(p.index[0])
                raise InputError(f"{path}: every date in column {col!r} (e.g. {text[r]!r}, "
                                 f"row {r}) has its day and month both 12 or less, so "
                                 "day-first and month-first cannot be told apart; give the "
                                 f"date format ({opt}, e.g. %d.%m.%Y or %m/%d/%Y).")
            day, month = (first, second) if day_first.any() else (second, first)
            day_text = (p[3] + "-" + month.map("{:02d}".format) + "-"
                        + day.map("{:02d}".format))
            rest = p[4].fillna("")
            clock = rest.str.extract("^" + _CLOCK.pattern + "$")
            hms = ("T" + clock[0].str.zfill(2) + ":" + clock[1] + ":" + clock[2].fillna("00"))
            # A plain clock time becomes ISO; any other time part is kept after a space.
            rest = hms.where(clock[0].notna(), (" " + rest.str.lstrip(" T,")).where(
                rest.ne(""), ""))
            stamp = day_text + rest
            bad_date = (pd.to_datetime(day_text, format="%Y-%m-%d", errors="coerce").isna()
                        | pd.to_datetime(stamp, format="mixed", errors="coerce").isna())
            if bad_date.any():
                r = int(bad_date[bad_date].index[0])
                order = "day first" if day_first.any() else "month first"
                raise InputError(f"{path}, row {r}: column {col!r} holds {text[r]!r}, which is "
                                 f"not a date when read {order} as the other dates in the "
                                 "column are; fix the value.")
            iso = text.copy()
            iso[found] = stamp
        if out is df:
            out = df.copy()
        out[col] = iso.where(given, text)
    return out


def _numeric_names(table: Table) -> list[str]:
    return [c.name for c in table.columns if c.kind in ("int", "float")]


def _date_names(table: Table) -> list[str]:
    return [c.name for c in table.columns if c.kind == "date"]


def map_columns(df: pd.DataFrame, mapping: Mapping[str, str], table: Table, path: Path,
                option: str) -> pd.DataFrame:
    """Rename the user's headers to ours and check the required columns.

    Parameters
    ----------
    df
        The table as read.
    mapping
        ``{ours: theirs}`` from ``--columns``-style options or a config table.
    table
        The schema table the file must follow.
    path
        The file, for messages.
    option
        The option that maps this table's headers, for messages.

    Returns
    -------
    pandas.DataFrame
        Only the schema's columns that are present, named as ours.
    """
    known = set(table.names)
    for ours, theirs in mapping.items():
        if ours not in known:
            raise InputError(f"{option} maps {ours!r}, which is not a column of the "
                             f"{table.name} table; known columns: {', '.join(table.names)}.")
        if theirs not in df.columns:
            raise InputError(f"{path} has no column {theirs!r} (mapped to {ours!r} by "
                             f"{option}); columns present: {', '.join(map(str, df.columns))}.")
    rename = {theirs: ours for ours, theirs in mapping.items()}
    lower = {str(c).lower(): c for c in df.columns}
    for name in table.names:
        if name not in mapping and name not in df.columns and name in lower:
            rename[lower[name]] = name  # case-insensitive match of our own names
    df = df.rename(columns=rename)
    missing = [c for c in table.required if c not in df.columns]
    if missing:
        raise InputError(f"{path} has no column {missing[0]!r}; map yours with {option} "
                         f"{missing[0]}=YOUR_HEADER (columns present: "
                         f"{', '.join(map(str, df.columns))}).")
    return df[[c for c in table.names if c in df.columns]].copy()


def read_table(path: Path, table: Table, mapping: Mapping[str, str] | None = None,
               option: str = "--columns", *, decimal: str | None = None,
               date_format: str | None = None) -> pd.DataFrame:
    """Read a CSV or Parquet table, map headers and check required columns.

    Parameters
    ----------
    path
        The file (``.parquet``/``.pq`` read as Parquet, anything else as text).
    table
        Schema table to validate against; its ``int``/``float`` columns are numbers and
        its ``date`` columns dates.
    mapping
        Header mapping ``{ours: theirs}``.
    option
        Option name to suggest in messages.
    decimal
        Decimal mark of the numbers, ``"."`` or ``","``; None detects it
        (:func:`decimal_marks`).
    date_format
        ``strptime`` format of the dates; None detects the order (:func:`normalise_dates`).

    Returns
    -------
    pandas.DataFrame
        String values (numbers with a decimal point, dates in ISO 8601), our column
        names, and ``row``: the row as a spreadsheet shows the file (header = row 1, so
        the first data row is 2).
    """
    _check_file(path)
    sep: str | None = None
    if path.suffix.lower() in (".parquet", ".pq"):
        df = _read_parquet(path)
    else:
        df, sep = _read_text(path)
    df = map_columns(df, mapping or {}, table, path, option)
    df = decimal_marks(df, _numeric_names(table), path, sep, decimal)
    df = normalise_dates(df, _date_names(table), path, date_format)
    df.insert(0, "row", df.index.to_numpy(dtype=int))
    return df.reset_index(drop=True)


def read_casts(path: Path, mapping: Mapping[str, str] | None = None, *,
               decimal: str | None = None, date_format: str | None = None) -> pd.DataFrame:
    """Read a casts file (see :data:`coldindex.schema.CASTS`).

    ``decimal`` and ``date_format`` as in :func:`read_table`: numbers
    with a decimal comma are read as such, and ``date`` is rewritten as ISO 8601 with the
    day-month order detected (or given).
    """
    return read_table(path, CASTS, mapping, "--columns", decimal=decimal,
                      date_format=date_format)


def _numbers(df: pd.DataFrame, col: str) -> pd.Series:
    return pd.to_numeric(df[col].astype(str).str.strip().replace("", np.nan), errors="coerce")


def _check_months(df: pd.DataFrame, path: object) -> None:
    text = df["month"].astype(str).str.strip()
    month = _numbers(df, "month")
    with np.errstate(invalid="ignore"):
        bad = ~(month.between(1, 12) & (month == month.round()))
    if bad.any():
        r = df.loc[bad, "row"].iloc[0]
        raise InputError(f"{path}, row {r}: column 'month' holds {text[bad].iloc[0]!r}, not a "
                         "calendar month 1..12; fix the value.")


def read_ice(path: Path, mapping: Mapping[str, str] | None = None, *,
             decimal: str | None = None) -> pd.DataFrame:
    """Read a monthly ice file (see :data:`coldindex.schema.ICE`).

    Years must lie in :data:`OBSERVED_YEARS`, months be whole numbers 1..12, and values
    be of plausible size (finite, ``|x| <=`` :data:`MAX_ABS_VALUE`); the row is named
    otherwise. ``decimal`` as in :func:`read_table`.
    """
    df = read_table(path, ICE, mapping, "--ice-columns", decimal=decimal)
    _check_years(_numbers(df, "year"), df["row"], path, "year", OBSERVED_YEARS)
    _check_months(df, path)
    _check_magnitude(_numbers(df, "ice"), df["row"], path, "ice")
    return df


def read_trajectories(path: Path, mapping: Mapping[str, str] | None = None, *,
                      decimal: str | None = None) -> pd.DataFrame:
    """Read a trajectories file (see :data:`coldindex.schema.TRAJECTORIES`).

    Years must lie in :data:`TRAJECTORY_YEARS`, values be of plausible size, and
    model and scenario names be non-blank and differ from the summary rows the
    projection adds (:data:`SUMMARY_ROW_NAMES`). ``decimal`` as in
    :func:`read_table`.
    """
    df = read_table(path, TRAJECTORIES, mapping, "--trajectory-columns", decimal=decimal)
    _check_years(_numbers(df, "year"), df["row"], path, "year", TRAJECTORY_YEARS)
    _check_magnitude(_numbers(df, "value"), df["row"], path, "value")
    _check_names(df, path)
    return df


def _check_names(df: pd.DataFrame, path: object) -> None:
    for col in ("model", "scenario"):
        if col not in df.columns:
            continue
        names = df[col].astype(str).str.strip()
        blank = names.eq("") | names.str.lower().isin(["nan", "none", "null"])
        if blank.any():
            r = df["row"][blank].iloc[0] if "row" in df else "?"
            raise InputError(f"{path}, row {r}: column {col!r} is blank; name every {col}.")
        clash = names.str.lower().isin(SUMMARY_ROW_NAMES)
        if clash.any():
            r = df["row"][clash].iloc[0] if "row" in df else "?"
            raise InputError(f"{path}, row {r}: the {col} name {names[clash].iloc[0]!r} is "
                             "reserved for the summary rows coldindex adds; rename it.")


def check_trajectories(traj: pd.DataFrame, source: str) -> None:
    """Refuse trajectories no projection can use: blank or reserved names, a model all missing.

    Parameters
    ----------
    traj
        ``model``, ``scenario``, ``year``, ``value`` (from CSV files or the gridded path).
    source
        The files, for messages.
    """
    _check_names(traj.assign(row="?") if "row" not in traj else traj, source)
    _check_years(pd.to_numeric(traj["year"], errors="coerce"), pd.Series(["?"] * len(traj),
                 index=traj.index), source, "year", TRAJECTORY_YEARS)
    values = pd.to_numeric(traj["value"], errors="coerce")
    for (model, scenario), g in values.groupby([traj["model"], traj["scenario"]]):
        if not np.isfinite(g.to_numpy(float)).any():
            raise InputError(f"{source}: model {model!r} under scenario {scenario!r} holds no "
                             "finite value (all missing); remove it or fix its data.")


def read_domain(path: Path) -> Domain:
    """Read a domain polygon from GeoJSON (one Polygon or MultiPolygon, lon/lat)."""
    obj = read_json(path, "give one Polygon or MultiPolygon", "GeoJSON")
    if not isinstance(obj, dict):
        raise InputError(f"{path} is not a GeoJSON object.")
    try:
        return domain_from_geojson(obj)
    except InputError as exc:
        raise InputError(f"{path}: {exc}") from None
    except (ValueError, TypeError, KeyError, IndexError, AttributeError) as exc:
        raise InputError(f"{path} is not a usable survey domain ({type(exc).__name__}); give one "
                         "Polygon or MultiPolygon of the survey area in lon/lat, smaller than "
                         "a hemisphere.") from None


def read_regions(path: Path, domain: Domain) -> list:
    """Read named regions from GeoJSON into the domain's plane (:mod:`coldindex.regions`)."""
    from coldindex.regions import regions_from_geojson

    obj = read_json(path, "give a FeatureCollection of named polygons (--regions)", "GeoJSON")
    return regions_from_geojson(obj, domain, source=str(path))


def read_coastline(path: Path, domain: Domain) -> list:
    """Read a coastline (GeoJSON lines or polygons) into the domain's plane, for maps."""
    from coldindex.regions import lines_from_geojson

    obj = read_json(path, "give the coastline as lines or polygons (inputs.coastline)",
                    "GeoJSON")
    return lines_from_geojson(obj, domain, source=str(path))


def read_bathymetry(path: Path) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Read a bathymetry grid on 1-D lon/lat axes.

    Returns
    -------
    tuple
        ``(lon_axis, lat_axis, depth)`` with depth positive down, shape (lat, lon). [m]
    """
    _check_file(path)
    try:
        ds = xr.open_dataset(path)
    except Exception as exc:  # netCDF backends raise many error types
        raise InputError(f"{path} cannot be read as NetCDF ({type(exc).__name__}); check "
                         "that the file is complete.") from None
    with ds:
        names = [v for v in ds.data_vars if ds[v].ndim == 2]
        pick = [v for v in names if v in ("depth", "depth_m", "elevation", "z", "bathymetry")]
        if not pick:
            present = ", ".join(map(str, ds.data_vars))
            raise InputError(f"{path} has no 2-D depth variable (looked for depth, elevation, "
                             f"z, bathymetry; variables present: {present}).")
        da = ds[pick[0]]
        lon_name = next((d for d in da.dims if str(d).lower().startswith("lon")), None)
        lat_name = next((d for d in da.dims if str(d).lower().startswith("lat")), None)
        if lon_name is None or lat_name is None:
            raise InputError(f"{path}: variable {pick[0]!r} needs lon and lat dimensions, "
                             f"has {', '.join(map(str, da.dims))}.")
        da = da.transpose(lat_name, lon_name)
        try:
            values = np.asarray(da.values, dtype=float)
            lon_axis = np.asarray(ds[lon_name].values, float)
            lat_axis = np.asarray(ds[lat_name].values, float)
        except Exception as exc:  # a truncated file fails only when read
            raise InputError(f"{path} cannot be read ({type(exc).__name__}); check that the "
                             "file is complete.") from None
        for name, axis in (("lon", lon_axis), ("lat", lat_axis)):
            steps = np.diff(axis)
            if (len(axis) < 2 or not np.all(np.isfinite(axis))
                    or not (np.all(steps > 0) or np.all(steps < 0))):
                raise InputError(f"{path}: the {name} axis is not strictly monotonic; the file "
                                 "is damaged or not on a regular lon/lat grid.")
        if not np.isfinite(values).any():
            raise InputError(f"{path} holds no finite depth; check the file.")
        if pick[0] in ("elevation", "z") or str(da.attrs.get("positive", "down")) == "up":
            values = -values
        return lon_axis, lat_axis, values


def check_netcdf(path: Path, option: str) -> None:
    """Refuse a file that does not open as NetCDF, before any work."""
    _check_file(path)
    try:
        ds = xr.open_dataset(path)
    except Exception as exc:  # netCDF backends raise many error types
        raise InputError(f"{path} ({option}) cannot be read as NetCDF ({type(exc).__name__}); "
                         "give a complete NetCDF file.") from None
    ds.close()


def read_series(path: Path, value: str, mapping: Mapping[str, str] | None = None,
                option: str = "--columns", *, decimal: str | None = None) -> pd.DataFrame:
    """Read a yearly series: ``year`` and the value column (and its ``_sd`` when present).

    Parameters
    ----------
    path
        CSV or Parquet file with one row a year (e.g. ``indices.csv``).
    value
        The value column (after mapping).
    mapping
        Header mapping ``{ours: theirs}``; ``year`` and ``value`` names may be mapped.
    option
        Option name used in messages.
    decimal
        Decimal mark, ``"."`` or ``","``; None detects it (:func:`decimal_marks`).

    Returns
    -------
    pandas.DataFrame
        ``year`` (int), ``value`` (float, NaN for blanks) and ``sd`` when the file
        has ``<value>_sd``; sorted by year.
    """
    _check_file(path)
    sep: str | None = None
    if path.suffix.lower() in (".parquet", ".pq"):
        df = _read_parquet(path)
    else:
        df, sep = _read_text(path)
    rename = {theirs: ours for ours, theirs in (mapping or {}).items()}
    for theirs in rename:
        if theirs not in df.columns:
            raise InputError(f"{path} has no column {theirs!r} (mapped by {option}); columns "
                             f"present: {', '.join(map(str, df.columns))}.")
    df = df.rename(columns=rename)
    for col in ("year", value):
        if col not in df.columns:
            raise InputError(f"{path} has no column {col!r}; pick one with --value or map it "
                             f"with {option} {col}=YOUR_HEADER (columns present: "
                             f"{', '.join(map(str, df.columns))}).")
    df = decimal_marks(df, ["year", value, f"{value}_sd"], path, sep, decimal)
    rows = pd.Series(df.index.to_numpy(dtype=int), index=df.index)
    years = pd.to_numeric(df["year"], errors="coerce")
    with np.errstate(invalid="ignore"):
        bad_year = years.isna() | ~np.isfinite(years) | (years != years.round())
    if bad_year.any():
        r = rows[bad_year].iloc[0]
        raise InputError(f"{path}, row {r}: column 'year' needs a whole year, got: "
                         f"{df['year'][bad_year].iloc[0]!r}.")
    _check_years(years, rows, path, "year", OBSERVED_YEARS)
    text = df[value].astype(str).str.strip()
    blank = text.eq("") | text.str.lower().isin(["na", "nan", "null", "none", "-"])
    vals = pd.to_numeric(text.where(~blank), errors="coerce")
    with np.errstate(invalid="ignore"):
        bad_mask = ~blank & (vals.isna() | ~(vals.abs() <= MAX_ABS_VALUE))
    if bad_mask.any():
        r = rows[bad_mask].iloc[0]
        raise InputError(f"{path}, row {r}: column {value!r} needs a finite number of "
                         f"plausible size (|x| <= {MAX_ABS_VALUE:g}) or a blank, got: "
                         f"{df[value][bad_mask].iloc[0]!r}.")
    if not vals.notna().any():
        raise InputError(f"{path}: column {value!r} holds no value (every row is blank); "
                         "give a series with values.")
    out = pd.DataFrame({"year": years.astype(int), "value": vals.astype(float)})
    dup = out["year"][out["year"].duplicated()]
    if len(dup):
        raise InputError(f"{path}: year {int(dup.iloc[0])} appears more than once; keep one row "
                         "a year.")
    if f"{value}_sd" in df.columns:
        sd = pd.to_numeric(df[f"{value}_sd"].replace("", np.nan), errors="coerce")
        out["sd"] = sd.where(np.isfinite(sd) & (sd >= 0))  # a damaged SD is no SD
    return out.sort_values("year").reset_index(drop=True)


def read_frozen(path: Path) -> dict:
    """The state frozen by an earlier run (``frozen.json``), or {} when there is none."""
    if not path.is_file():
        return {}
    try:
        obj = json.loads(path.read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError, RecursionError):
        obj = None
    if not isinstance(obj, dict) or not isinstance(obj.get("variogram_family"), (str, type(None))):
        raise InputError(f"{path} is damaged; delete it to choose the domain and variogram "
                         "family afresh (past values may move).")
    return obj


def read_cuts(path: Path) -> dict:
    """Read a ``cuts.json`` file as a dictionary."""
    obj = read_json(path, "write it with coldindex classify")
    if not isinstance(obj, dict):
        raise InputError(f"{path} is not a cuts object; write it with coldindex classify.")
    for key in ("low", "high"):
        v = obj.get(key)
        if key in obj and (isinstance(v, bool) or not isinstance(v, (int, float))
                           or not np.isfinite(v) or abs(v) > MAX_ABS_VALUE):
            raise InputError(f"{path}: {key!r} needs a finite number, got: {v!r}; write the file "
                             "with coldindex classify.")
    if isinstance(obj.get("low"), (int, float)) and isinstance(obj.get("high"), (int, float)) \
            and obj["low"] > obj["high"]:
        raise InputError(f"{path}: 'low' ({obj['low']}) is above 'high' ({obj['high']}); write "
                         "the file with coldindex classify.")
    if "column" in obj and not isinstance(obj["column"], str):
        raise InputError(f"{path}: 'column' needs a column name, got: {obj['column']!r}.")
    if "direction" in obj and obj["direction"] not in ("lower", "higher"):
        raise InputError(f"{path}: 'direction' needs to be lower or higher, got: "
                         f"{obj['direction']!r}.")
    return obj
