"""Atomic writers: each file goes to a temporary name beside it, then ``os.replace``.

An interrupted run never leaves a half-written output. :func:`prepare_out_dir`
refuses an output path that is a file before any work starts.
"""

from __future__ import annotations

import hashlib
import json
import os
import tempfile
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from coldindex._version import __version__
from coldindex.domain import Domain, Grid
from coldindex.errors import OutputError
from coldindex.schema import threshold_label


def prepare_out_dir(path: Path) -> Path:
    """Create the output folder, or refuse a path that is a file."""
    if path.exists() and not path.is_dir():
        raise OutputError(f"The output path {path} is a file; give a folder (it is created "
                          "when missing).")
    try:
        path.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"Cannot create the output folder {path} ({exc.strerror}).") from None
    return path


@contextmanager
def atomic_path(target: Path) -> Iterator[Path]:
    """Yield a temporary path beside ``target``; move it into place on success."""
    target.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
    os.close(fd)
    tmp_path = Path(tmp)
    try:
        yield tmp_path
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp_path, 0o666 & ~umask)
        os.replace(tmp_path, target)
    finally:
        if tmp_path.exists():
            tmp_path.unlink()


def _write_with(target: Path, write: Callable[[Path], Any]) -> Path:
    with atomic_path(target) as tmp:
        write(tmp)
    return target


def write_csv(df: pd.DataFrame, target: Path, float_format: str = "%.6g") -> Path:
    """Write a table as UTF-8 CSV with newline line ends, atomically."""
    return _write_with(target, lambda p: df.to_csv(p, index=False, float_format=float_format,
                                                   lineterminator="\n"))


def write_json(obj: Any, target: Path) -> Path:
    """Write JSON (sorted keys, 2-space indent), atomically."""
    text = json.dumps(obj, indent=2, sort_keys=True, ensure_ascii=False, default=str) + "\n"
    return _write_with(target, lambda p: p.write_text(text, encoding="utf-8"))


def write_netcdf(ds: xr.Dataset, target: Path) -> Path:
    """Write a Dataset as NetCDF-4 with compressed float variables, atomically."""
    encoding = {name: {"zlib": True, "complevel": 4} for name, v in ds.data_vars.items()
                if v.dtype.kind == "f"}
    return _write_with(target, lambda p: ds.to_netcdf(p, engine="netcdf4", encoding=encoding))


def write_figure(fig: Any, target: Path, close: bool = True) -> Path:
    """Save a matplotlib figure reproducibly (no timestamps; fixed SVG ids), atomically.

    The format follows the suffix (``.png`` or ``.svg``); the figure is closed unless
    ``close`` is false (to save it again in another format).
    """
    import matplotlib
    import matplotlib.pyplot as plt

    fmt = target.suffix.lstrip(".").lower()
    meta = {"Software": None} if fmt == "png" else {"Date": None, "Creator": None}
    with matplotlib.rc_context({"svg.hashsalt": "coldindex", "svg.fonttype": "none"}):
        _write_with(target, lambda p: fig.savefig(p, format=fmt, dpi=130, metadata=meta))
    if close:
        plt.close(fig)
    return target


def write_bytes(data: bytes, target: Path) -> Path:
    """Write raw bytes atomically."""
    return _write_with(target, lambda p: p.write_bytes(data))


def sha256_file(path: Path) -> str:
    """SHA-256 of a file's bytes, hex."""
    h = hashlib.sha256()
    with path.open("rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def fields_dataset(years: list[int], estimate: np.ndarray, sd: np.ndarray,
                   thresholds: Sequence[float], grid: Grid, domain: Domain,
                   casts: pd.DataFrame) -> xr.Dataset:
    """Assemble the CF-1.8 ``fields.nc`` Dataset from per-year fields.

    Parameters
    ----------
    years
        Survey years.
    estimate, sd
        Mapped bottom temperature and standard deviation at the active cells,
        (n_years, m). [°C]
    thresholds
        Thresholds for the probability variables. [°C]
    grid, domain
        The grid and its domain (for coordinates and the grid mapping).
    casts
        Casts used, with ``year``, ``lat``, ``lon``, ``bottom_c``.

    Returns
    -------
    xarray.Dataset
        The dataset, ready for :func:`write_netcdf`.
    """
    from scipy.special import ndtr

    est2 = grid.to_2d(estimate).astype("float32")
    sd2 = grid.to_2d(sd).astype("float32")
    dims = ("year", "y", "x")
    common = {"grid_mapping": "albers_conical_equal_area", "coordinates": "lat lon",
              "cell_measures": "area: cell_area"}
    data_vars: dict[str, Any] = {
        "bottom_temperature": (dims, est2, {
            "standard_name": "sea_water_temperature", "units": "degC",
            "long_name": "kriged sea-floor water temperature (smooth process, nugget filtered)",
            "comment": "in-situ temperature at the sea floor; NaN outside the domain or in "
                       "years without indices", **common}),
        "bottom_temperature_sd": (dims, sd2, {
            "units": "degC", "long_name": "kriging standard deviation of the sea-floor water "
            "temperature (smooth process)", **common}),
    }
    for t in thresholds:
        with np.errstate(divide="ignore", invalid="ignore"):
            p = ndtr((t - est2.astype(float)) / sd2.astype(float))
        label = threshold_label(t)
        data_vars[f"p_below_{label}c"] = (dims, p.astype("float32"), {
            "units": "1", "long_name": f"probability that the sea-floor water temperature is "
            f"below {np.format_float_positional(float(t), trim='-')} degC", **common})
    area = np.where(grid.mask, grid.area_km2 * 1e6, np.nan)
    data_vars["cell_area"] = (("y", "x"), area, {
        "standard_name": "cell_area", "units": "m2", "grid_mapping": "albers_conical_equal_area",
        "long_name": "area of the cell inside the survey domain"})
    counts = casts.groupby("year").size().reindex(years, fill_value=0).to_numpy()
    data_vars["n_casts"] = (("year",), counts.astype("int32"), {
        "units": "1", "long_name": "casts used"})
    data_vars["cast_year"] = (("cast",), casts["year"].to_numpy("int32"), {
        "long_name": "survey year of the cast"})
    data_vars["cast_lat"] = (("cast",), casts["lat"].to_numpy(float), {
        "standard_name": "latitude", "units": "degrees_north"})
    data_vars["cast_lon"] = (("cast",), casts["lon"].to_numpy(float), {
        "standard_name": "longitude", "units": "degrees_east"})
    data_vars["cast_bottom_c"] = (("cast",), casts["bottom_c"].to_numpy(float), {
        "units": "degC", "long_name": "bottom temperature of the cast"})
    cf = domain.crs.to_cf()
    data_vars["albers_conical_equal_area"] = ((), np.int32(0), cf)
    coords = {
        "year": ("year", np.asarray(years, "int32"), {"long_name": "survey year"}),
        "y": ("y", grid.y * 1000.0, {"standard_name": "projection_y_coordinate",
                                     "units": "m"}),
        "x": ("x", grid.x * 1000.0, {"standard_name": "projection_x_coordinate",
                                     "units": "m"}),
        "lat": (("y", "x"), grid.lat, {"standard_name": "latitude",
                                       "units": "degrees_north"}),
        "lon": (("y", "x"), grid.lon, {"standard_name": "longitude", "units": "degrees_east"}),
    }
    return xr.Dataset(data_vars, coords=coords, attrs={
        "Conventions": "CF-1.8", "title": "Bottom-temperature fields by coldindex",
        "source": f"coldindex {__version__}",
        "comment": "Decision support only; defer to the responsible agency's reviewed "
                   "assessment."})
