"""Years in parallel: ``coldindex index`` on the sample with 1 and with N worker processes.

Each run is a whole process (reading, QC, the family choice, the years, writing) into a
fresh output folder, so every run chooses the variogram family as a first run does. BLAS
runs one thread a task in both (``coldindex.parallel.BLAS_THREADS``: the pin is in the
code, the same for ``--workers 1``), so the speed-up is that of the years alone, not of
BLAS threads traded for processes. Runs alternate (1, N, 1, N, ...) so a machine that
gets busier part-way hurts both alike; the table gives the median of each.

Peak memory: the largest total of the run's process tree (the command, the process
server and the workers; proportional set sizes, so shared pages count once), sampled
every 0.1 s with psutil; a parallel run holds one year's working memory per worker.

After the timings, the outputs of the two settings are compared byte for byte
(``indices.csv``, ``regions.csv`` when written, ``fields.nc``'s data variables).

Run (on a quiet machine)::

    python benchmarks/bench_parallel.py [--workers 2] [--repeats 3]
"""

from __future__ import annotations

import argparse
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import psutil

ROOT = Path(__file__).resolve().parents[1]
SAMPLE = ROOT / "sample_inputs"


def command(out: Path, workers: int) -> list[str]:
    """The ``coldindex index`` command on the sample, as in benchmarks/README.md."""
    return [sys.executable, "-m", "coldindex.cli", "index", str(SAMPLE / "casts.csv"),
            "--out", str(out), "--domain", str(SAMPLE / "domain.geojson"),
            "--bathymetry", str(SAMPLE / "bathymetry.nc"), "--workers", str(workers),
            "--no-progress"]


def tree_memory(proc: psutil.Process) -> int:
    """Memory of a process and all its descendants. [bytes]

    The proportional set size where the system reports it (Linux: a page shared by k
    processes counts 1/k in each, so the sum is what the tree holds; the workers share
    the pages of the modules they inherited), else the resident set size.
    """
    total = 0
    for p in [proc, *proc.children(recursive=True)]:
        try:
            info = p.memory_full_info()
            total += getattr(info, "pss", info.rss)
        except psutil.Error:  # ended between listing and reading
            pass
    return total


def timed_run(out: Path, workers: int) -> tuple[float, int]:
    """Wall time [s] and peak memory of the process tree [bytes] of one whole-process run."""
    t0 = time.perf_counter()
    proc = subprocess.Popen(command(out, workers), stdout=subprocess.DEVNULL,
                            stderr=subprocess.PIPE, text=True)
    ps = psutil.Process(proc.pid)
    peak = 0
    while proc.poll() is None:
        try:
            peak = max(peak, tree_memory(ps))
        except psutil.Error:
            pass
        time.sleep(0.1)
    wall = time.perf_counter() - t0
    if proc.returncode != 0:
        assert proc.stderr is not None
        sys.exit(f"coldindex index --workers {workers} failed ({proc.returncode}): "
                 f"{proc.stderr.read()}")
    return wall, peak


def same_outputs(a: Path, b: Path) -> list[str]:
    """Names of the outputs whose content differs between two runs (empty: identical)."""
    import xarray as xr

    differ = []
    for name in ("indices.csv", "regions.csv", "qc.csv"):
        if (a / name).exists() and (a / name).read_bytes() != (b / name).read_bytes():
            differ.append(name)
    with xr.open_dataset(a / "fields.nc") as fa, xr.open_dataset(b / "fields.nc") as fb:
        for v in fa.data_vars:
            if not fa[v].identical(fb[v]):
                differ.append(f"fields.nc:{v}")
    return differ


def main() -> None:
    """Time the runs and print the table."""
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--workers", type=int, default=2, help="workers of the parallel run")
    ap.add_argument("--repeats", type=int, default=3, help="runs of each setting")
    args = ap.parse_args()
    times: dict[int, list[float]] = {1: [], args.workers: []}
    peaks: dict[int, list[int]] = {1: [], args.workers: []}
    with tempfile.TemporaryDirectory(prefix="bench_parallel_") as tmp:
        for rep in range(args.repeats):
            for w in (1, args.workers):
                out = Path(tmp) / f"w{w}-r{rep}"
                wall, peak = timed_run(out, w)
                times[w].append(wall)
                peaks[w].append(peak)
                print(f"run {rep + 1}, --workers {w}: {wall:.1f} s, peak {peak / 2**20:.0f} MB",
                      flush=True)
        differ = same_outputs(Path(tmp) / "w1-r0", Path(tmp) / f"w{args.workers}-r0")
    t1, tn = statistics.median(times[1]), statistics.median(times[args.workers])
    print()
    print("| run | median wall time | peak memory (process tree) |")
    print("|---|---|---|")
    for w, t in ((1, t1), (args.workers, tn)):
        print(f"| `--workers {w}` | {t:.1f} s | {max(peaks[w]) / 2**20:.0f} MB |")
    print(f"\nspeed-up: {t1 / tn:.2f}x on {args.workers} workers "
          f"({psutil.cpu_count(logical=True)} logical cores, {args.repeats} runs each)")
    print("outputs identical" if not differ else f"outputs DIFFER: {', '.join(differ)}")


if __name__ == "__main__":
    main()
