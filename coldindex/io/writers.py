"""Safe writers: every file is staged under a unique temporary name, then ``os.replace``d.

Rules that keep outputs honest and inputs safe:

* a temporary file lives in a private folder (``tempfile.mkdtemp``, mode 0700, a unique
  name per run) beside its target, so no temporary name can be guessed, planted or
  followed as a symbolic link;
* a target that is a symbolic link or a folder is refused, never written through;
* :class:`OutputSet` stages every output of one command and replaces the targets only
  when all of them are written, then writes a small completion manifest
  (:data:`MANIFEST_NAME`) last, so an incomplete set is detectable;
* :func:`refuse_overwriting_inputs` refuses, before any work, an output that resolves
  (real path or inode) to one of the command's inputs;
* operating-system failures (disk full, read-only file system, permission denied) and
  library write failures become :class:`~coldindex.errors.OutputError` sentences naming
  the file.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import tempfile
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from coldindex._version import __version__
from coldindex.domain import Domain, Grid
from coldindex.errors import ColdindexError, OutputError, os_error_sentence
from coldindex.io.files import same_file
from coldindex.schema import Table, output_table, threshold_label

MANIFEST_NAME = "complete.json"
"""Completion manifest a single command writes last into its output folder."""


def prepare_out_dir(path: Path) -> Path:
    """Create the output folder, or refuse a path that is a file."""
    if path.exists() and not path.is_dir():
        raise OutputError(f"The output path {path} is a file; give a folder (it is created "
                          "when missing).")
    try:
        path.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(os_error_sentence(exc, "creating the output folder", path)) from None
    return path


def refuse_overwriting_inputs(targets: Iterable[Path], inputs: Iterable[Path | None],
                              option: str = "--out") -> None:
    """Refuse outputs that would replace an input, or that are links or folders.

    Runs before any work and creates nothing. Inputs that merely sit in the output
    folder are fine; only a target resolving to an input (same real path, or same
    device and inode, e.g. a hard link) is refused.

    Parameters
    ----------
    targets
        Every file the command would write.
    inputs
        Every file the command reads (None entries are skipped).
    option
        The option naming the output folder, for messages.
    """
    ins = [Path(p) for p in inputs if p is not None]
    for t in targets:
        if t.is_symlink():
            raise OutputError(f"{t} is a symbolic link; coldindex never writes through links, "
                              f"so remove it or choose another {option}.")
        if t.is_dir():
            raise OutputError(f"{t} is a folder where coldindex writes a file; move it away "
                              f"or choose another {option}.")
        for p in ins:
            if same_file(t, p):
                raise OutputError(f"Writing {t} would overwrite the input {p}; choose another "
                                  f"{option} (inputs are never replaced).")


def _fail(exc: BaseException, target: Path) -> OutputError:
    if isinstance(exc, OSError):
        return OutputError(os_error_sentence(exc, "writing", target))
    detail = str(exc).strip().splitlines()[0][:160] if str(exc).strip() else ""
    return OutputError(f"Writing {target} failed ({type(exc).__name__}"
                       f"{': ' + detail if detail else ''}); check the free space and the "
                       "permissions of the folder, then run again.")


def _private_dir(parent: Path, prefix: str) -> Path:
    try:
        parent.mkdir(parents=True, exist_ok=True)
        return Path(tempfile.mkdtemp(prefix=prefix, dir=parent))
    except OSError as exc:
        raise OutputError(os_error_sentence(exc, "writing into", parent)) from None


def _check_target(target: Path) -> None:
    """Refuse a target that is a symbolic link or a folder."""
    if target.is_symlink():
        raise OutputError(f"{target} is a symbolic link; coldindex never writes through links, "
                          "so remove it and run again.")
    if target.is_dir():
        raise OutputError(f"{target} is a folder where coldindex writes a file; move it away "
                          "and run again.")


def _replace(src: Path, target: Path) -> None:
    """Move a finished file onto its target without following a link there."""
    _check_target(target)
    umask = os.umask(0)
    os.umask(umask)
    os.chmod(src, 0o666 & ~umask)
    os.replace(src, target)


@contextmanager
def atomic_path(target: Path) -> Iterator[Path]:
    """Yield a temporary path beside ``target``; move it into place on success.

    The temporary lives in a private, uniquely named folder beside the target, so
    it can be neither guessed nor replaced by a link; the target itself is refused
    when it is a link or a folder. Any failure removes the temporary and leaves
    the target as it was; operating-system and library errors become
    :class:`~coldindex.errors.OutputError`.
    """
    _check_target(target)
    tmpdir = _private_dir(target.parent, f".{target.name}.")
    try:
        tmp_path = tmpdir / target.name
        try:
            yield tmp_path
            if not tmp_path.is_file() or tmp_path.is_symlink():
                raise OutputError(f"Writing {target} produced no file; run again.")
            _replace(tmp_path, target)
        except (ColdindexError, MemoryError, KeyboardInterrupt, GeneratorExit):
            raise
        except Exception as exc:
            raise _fail(exc, target) from None
    finally:
        shutil.rmtree(tmpdir, ignore_errors=True)


def _write_with(target: Path, write: Callable[[Path], Any]) -> Path:
    with atomic_path(target) as tmp:
        write(tmp)
    return target


def write_csv(df: pd.DataFrame, target: Path, float_format: str = "%.6g") -> Path:
    """Write a table as UTF-8 CSV with newline line ends, atomically."""
    return _write_with(target, lambda p: df.to_csv(p, index=False, float_format=float_format,
                                                   lineterminator="\n"))


def write_table(df: pd.DataFrame, target: Path, table: Table | str | None = None,
                float_format: str = "%.6g") -> Path:
    """Write an output table as CSV with the schema's columns in the schema's order.

    The schema (:mod:`coldindex.schema`) is the single source of the output columns: the
    frame's declared columns are written in declared order, its ``internal`` columns
    dropped, and a column the schema does not declare is a programming error.

    Parameters
    ----------
    df
        The table.
    target
        The file (written atomically, as :func:`write_csv`).
    table
        The schema table, or the output's file name for
        :func:`coldindex.schema.output_table`; None takes ``target``'s name.
    float_format
        Format of floating-point values.

    Returns
    -------
    Path
        ``target``.

    Raises
    ------
    ValueError
        The frame carries a column the table does not declare, or the name is no
        declared output.
    """
    layout = table if isinstance(table, Table) else \
        output_table(table or target.name, list(df.columns))
    return write_csv(layout.conform(df), target, float_format)


def write_json(obj: Any, target: Path) -> Path:
    """Write JSON (sorted keys, 2-space indent), atomically."""
    text = json.dumps(obj, indent=2, sort_keys=True, ensure_ascii=False, default=str) + "\n"
    return _write_with(target, lambda p: p.write_text(text, encoding="utf-8"))


def write_netcdf(ds: xr.Dataset, target: Path) -> Path:
    """Write a Dataset as NetCDF-4 with compressed float variables, atomically.

    Lazy (dask) variables, like the per-year fields of :func:`fields_dataset`, are
    written after the rest, one chunk along their first axis at a time, in a fixed
    order, and stored in chunks of that size; memory holds about one year of one
    variable, and the same dataset gives the same bytes.
    """
    import dask.array as da

    lazy = [str(name) for name, v in ds.data_vars.items() if isinstance(v.data, da.Array)]
    encoding = {name: {"zlib": True, "complevel": 1} for name, v in ds.data_vars.items()
                if v.dtype.kind == "f" and name not in lazy}

    def write(p: Path) -> None:
        import dask

        # In this process, never on a dask client a run may have started or left behind.
        with dask.config.set(scheduler="synchronous"):
            ds.drop_vars(lazy).to_netcdf(p, engine="netcdf4", encoding=encoding)
        if lazy:
            _append_lazy(p, ds, lazy)

    return _write_with(target, write)


def _append_lazy(path: Path, ds: xr.Dataset, names: Sequence[str]) -> None:
    """Append lazy variables to a NetCDF-4 file, one chunk of the first axis at a time."""
    import netCDF4

    with netCDF4.Dataset(path, "a") as nc:
        for name in names:
            v = ds[name]
            lead = int(v.data.chunks[0][0]) if v.shape[0] else 1
            fill = np.array(np.nan, dtype=v.dtype) if v.dtype.kind == "f" else None
            var = nc.createVariable(name, str(v.dtype), tuple(str(d) for d in v.dims),
                                    zlib=True, complevel=1,
                                    chunksizes=(lead, *v.shape[1:]) if v.size else None,
                                    fill_value=fill)
            var.setncatts(dict(v.attrs))
            for start in range(0, v.shape[0], lead):
                stop = min(start + lead, v.shape[0])
                var[start:stop] = np.asarray(v.data[start:stop].compute(
                    scheduler="synchronous"))


def write_figure(fig: Any, target: Path, close: bool = True) -> Path:
    """Save a matplotlib figure reproducibly (no timestamps; fixed SVG ids), atomically.

    The format follows the suffix (``.png`` or ``.svg``); the figure is closed unless
    ``close`` is false (to save it again in another format).
    """
    import matplotlib
    import matplotlib.pyplot as plt

    fmt = target.suffix.lstrip(".").lower()
    meta = {"Software": None} if fmt == "png" else {"Date": None, "Creator": None}
    try:
        with matplotlib.rc_context({"svg.hashsalt": "coldindex", "svg.fonttype": "none"}):
            _write_with(target, lambda p: fig.savefig(p, format=fmt, dpi=130, metadata=meta))
    finally:
        if close:
            plt.close(fig)
    return target


def write_bytes(data: bytes, target: Path) -> Path:
    """Write raw bytes atomically."""
    return _write_with(target, lambda p: p.write_bytes(data))


class OutputSet:
    """Stage every output of one command; replace the targets only when all are written.

    Used as a context manager around a command's writes: :attr:`dir` is a private
    staging folder inside ``out`` and :meth:`path` the staging path of one output.
    On a clean exit, once every named output is present, the old manifest is
    removed, every staged file replaces its target, and a new manifest
    (:data:`MANIFEST_NAME`, with each file's SHA-256) is written last. On any failure
    the staging folder is removed and the targets stay as they were. A staging folder
    left by a killed run (its lock no longer held) is removed by the next set opened
    in the same folder.

    Parameters
    ----------
    out
        The output folder (created by :func:`prepare_out_dir` beforehand).
    command
        The command's name, recorded in the manifest.
    names
        Every output's file name, in the order they are listed.
    """

    def __init__(self, out: Path, command: str, names: Sequence[str]) -> None:
        self.out = out
        self.command = command
        self.names = list(names)
        self.written: list[Path] = []
        self._dir: Path | None = None
        self._alive: Any = None

    @property
    def targets(self) -> list[Path]:
        """Every file the set writes, its manifest included."""
        return output_targets(self.out, self.names)

    @property
    def dir(self) -> Path:
        """The private staging folder."""
        assert self._dir is not None, "use OutputSet as a context manager"
        return self._dir

    def __enter__(self) -> OutputSet:
        from filelock import FileLock

        prepare_out_dir(self.out)
        self._dir = _private_dir(self.out, STAGING_PREFIX)
        self._alive = FileLock(str(self._dir / ALIVE_NAME), timeout=0)
        self._alive.acquire()  # held while the set is open; the OS frees it if we die
        _remove_dead_staging(self.out, self._dir)
        return self

    def path(self, name: str) -> Path:
        """The staging path of output ``name``."""
        assert name in self.names, f"{name} is not among the declared outputs"
        return self.dir / name

    def __exit__(self, exc_type: Any, exc: Any, tb: Any) -> None:
        try:
            if exc_type is None:
                self._commit(self.dir)
        finally:
            if self._alive is not None:
                self._alive.release()
            shutil.rmtree(self.dir, ignore_errors=True)

    def _commit(self, staging: Path) -> None:
        missing = [n for n in self.names if not (staging / n).is_file()]
        if missing:
            raise OutputError(f"{self.out / missing[0]} was not written; nothing was replaced, "
                              "run again.")
        hashes = {n: sha256_file(staging / n) for n in self.names}
        manifest = self.out / MANIFEST_NAME
        for target in self.targets:
            _check_target(target)  # nothing is replaced yet
        old = staging / ".previous-manifest"
        replaced = 0
        try:
            if manifest.exists():  # until the new one exists the set reads incomplete
                os.replace(manifest, old)
            for n in self.names:
                _replace(staging / n, self.out / n)
                replaced += 1
        except OSError as exc:
            if replaced == 0 and old.exists():  # nothing changed: the old set stays complete
                os.replace(old, manifest)
            raise OutputError(os_error_sentence(exc, "writing", self.out / n)) from None
        write_json({"tool": "coldindex", "version": __version__, "command": self.command,
                    "outputs_sha256": hashes}, manifest)
        self.written = [self.out / n for n in self.names]


STAGING_PREFIX = ".coldindex-staging-"
ALIVE_NAME = ".alive"


def _remove_dead_staging(out: Path, mine: Path) -> None:
    """Remove staging folders of killed runs: their lock is free (a live run holds it)."""
    import time

    from filelock import FileLock, Timeout

    for d in out.glob(STAGING_PREFIX + "*"):
        if d == mine or d.is_symlink() or not d.is_dir():
            continue
        alive = d / ALIVE_NAME
        try:
            if not alive.is_file():  # just created by another run, or not ours: leave young
                if time.time() - d.stat().st_mtime > 3600:
                    shutil.rmtree(d, ignore_errors=True)
                continue
            probe = FileLock(str(alive), timeout=0)
            probe.acquire()
        except Timeout:
            continue  # a live run is staging there
        except OSError:
            continue
        probe.release()
        shutil.rmtree(d, ignore_errors=True)


def output_targets(out: Path, names: Sequence[str]) -> list[Path]:
    """The files a command writes into ``out``, its completion manifest included."""
    return [out / n for n in (*names, MANIFEST_NAME)]


def sha256_file(path: Path) -> str:
    """SHA-256 of a file's bytes, hex."""
    h = hashlib.sha256()
    with path.open("rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


TIME_UNITS = "days since 1970-01-01 00:00:00"


def survey_times(years: Sequence[int], casts: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """Median cast date of each survey and its first and last cast dates. [days since 1970]

    Parameters
    ----------
    years
        Survey years.
    casts
        Casts used, with ``year`` and ``date`` (text; blank or unreadable dates are left out).

    Returns
    -------
    tuple
        Median dates (n,) and bounds (n, 2), in :data:`TIME_UNITS`; NaN for a year
        without dates.
    """
    time = np.full(len(years), np.nan)
    bounds = np.full((len(years), 2), np.nan)
    if "date" not in casts.columns or casts.empty:
        return time, bounds
    when = pd.to_datetime(casts["date"].where(casts["date"].astype(str).str.strip() != ""),
                          errors="coerce", format="mixed")
    days = (when - pd.Timestamp("1970-01-01")) / pd.Timedelta(days=1)
    for k, yr in enumerate(years):
        d = days[(casts["year"] == yr).to_numpy()].dropna().to_numpy(float)
        if len(d):
            time[k] = float(np.median(d))
            bounds[k] = (float(d.min()), float(d.max()))
    return time, bounds


def _year_fields(estimate: np.ndarray, sd: np.ndarray, grid: Grid,
                 what: float | str | None, token: str) -> Any:
    """One lazy (n_years, ny, nx) float32 field of ``fields.nc``, one dask chunk a year.

    ``what`` is None for the estimate, ``"sd"`` for its standard deviation, or a
    threshold T [°C] for ``P(T_cell < T) = Phi((T - m) / s)`` from the float32 map and
    SD (as stored). Cells outside the domain are NaN. ``token`` names the fields'
    content: the dask task names are made from it, so the write order, and the
    file's bytes, are the same from run to run.
    """
    import dask.array as da
    from scipy.special import ndtr

    est = np.asarray(estimate, float)
    sdv = np.asarray(sd, float)
    ny, nx = grid.shape
    mask = grid.mask
    n_years = est.shape[0]

    def place(k: int) -> np.ndarray:
        m32 = grid.to_2d(est[k]).astype("float32")
        if what is None:
            return m32
        s32 = grid.to_2d(sdv[k]).astype("float32")
        if what == "sd":
            return s32
        with np.errstate(divide="ignore", invalid="ignore"):
            p = ndtr((float(what) - m32.astype(float)) / s32.astype(float))
        return np.where(mask, p, np.nan).astype("float32")

    def block(block_id: tuple[int, int, int]) -> np.ndarray:
        return place(block_id[0])[None]

    if n_years == 0:
        return np.full((0, ny, nx), np.nan, dtype="float32")
    return da.map_blocks(block, dtype="float32", chunks=((1,) * n_years, (ny,), (nx,)),
                         name=f"coldindex-field-{what}-{token}", meta=np.empty(
                             (0, 0, 0), dtype="float32"))


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
        Casts used, with ``year``, ``lat``, ``lon``, ``bottom_c`` and ``date`` (for
        the CF time coordinate: median cast date per year, bounded by the first and
        last cast dates).

    Returns
    -------
    xarray.Dataset
        The dataset, ready for :func:`write_netcdf`. The per-year fields are lazy
        (dask, one chunk a year, made from ``estimate`` and ``sd`` when read), so a
        fine grid is placed on the 2-D grid and written one year at a time instead of
        being held whole, in several copies, at once.
    """
    h = hashlib.blake2b(digest_size=16)
    for a in (estimate, sd, grid.area_km2):
        h.update(np.ascontiguousarray(a, dtype=float).tobytes())
    token = h.hexdigest()
    est2 = _year_fields(estimate, sd, grid, None, token)
    sd2 = _year_fields(estimate, sd, grid, "sd", token)
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
        p = _year_fields(estimate, sd, grid, float(t), token)
        label = threshold_label(t)
        data_vars[f"p_below_{label}c"] = (dims, p, {
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
    time, bounds = survey_times(years, casts)
    data_vars["time_bnds"] = (("year", "nv"), bounds, {
        "units": TIME_UNITS, "calendar": "standard",
        "long_name": "first and last cast date of the survey"})
    coords = {
        "year": ("year", np.asarray(years, "int32"), {"long_name": "survey year"}),
        "time": ("year", time, {
            "standard_name": "time", "units": TIME_UNITS, "calendar": "standard",
            "axis": "T", "bounds": "time_bnds",
            "long_name": "median cast date of the survey (NaN without dates)"}),
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


def plan_outputs(out: Path, command: str, names: Sequence[str],
                 inputs: Iterable[Path | None], option: str = "--out") -> OutputSet:
    """Check a single command's outputs before any work and return their :class:`OutputSet`.

    Refuses an output folder that is a file, and any output that is a link, a folder,
    or the same file as one of ``inputs``; creates nothing (the folder is created when
    the set is entered, after the work).
    """
    if out.exists() and not out.is_dir():
        raise OutputError(f"The output path {out} is a file; give a folder (it is created "
                          "when missing).")
    refuse_overwriting_inputs(output_targets(out, names), inputs, option)
    return OutputSet(out, command, names)


def write_outputs(folder: Path, files: Mapping[str, object],
                  figures: Mapping[str, object] | None = None,
                  figure_formats: Sequence[str] = ("png",), figure_dir: str = "") -> list[Path]:
    """Write a stage's outputs into ``folder``: frames as CSV, mappings as JSON, bytes raw.

    Parameters
    ----------
    folder
        A staging folder (single command) or a partial release (update).
    files
        Outputs by file name (may hold a subfolder, e.g. ``cuts/x.json``).
    figures
        Figures by name, saved as ``<figure_dir>/<name>.<format>``.
    figure_formats
        Formats of each figure, e.g. ``("svg", "png")``.
    figure_dir
        Subfolder of the figures (empty: beside the files).

    Returns
    -------
    list of Path
        The files written.
    """
    written = []
    for name, obj in files.items():
        target = folder / name
        if isinstance(obj, pd.DataFrame):  # columns selected and ordered by the schema
            written.append(write_table(obj, target))
        elif isinstance(obj, bytes):
            written.append(write_bytes(obj, target))
        else:
            written.append(write_json(obj, target))
    for name, fig in (figures or {}).items():
        for k, fmt in enumerate(figure_formats):
            target = folder / figure_dir / f"{name}.{fmt}"
            written.append(write_figure(fig, target, close=k == len(figure_formats) - 1))
    return written
