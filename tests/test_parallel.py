"""Years in parallel give the same bytes as serial; errors and progress come back intact."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from threadpoolctl import threadpool_info

from coldindex.config import IndexOptions
from coldindex.domain import make_grid
from coldindex.errors import ConfigError, InputError, TooFewDataError
from coldindex.indices import IndexResult, compute_indices
from coldindex.parallel import BLAS_THREADS, map_years
from coldindex.progress import ProgressClock, ProgressEvent
from coldindex.qc import run_qc
from coldindex.regions import RegionWeights
from tests.conftest import synthetic_casts

YEARS = (2001, 2002, 2003, 2004)


def _qc(df: pd.DataFrame) -> pd.DataFrame:
    raw = df.astype(str)
    raw.insert(0, "row", np.arange(1, len(df) + 1))
    return run_qc(raw).casts


@pytest.fixture(scope="module")
def survey(box_domain):
    """Four small years: an outlier in 2002, too few casts in 2004, two regions."""
    df = synthetic_casts(years=YEARS, n_side=7)
    df.loc[(df["year"] == 2002) & (df["station"] == "S33"), "bottom_c"] += 4.0
    df = df[~((df["year"] == 2004) & (df.index % 3 != 0))]
    grid = make_grid(box_domain, 15.0)
    area = grid.active_area()
    half = (np.arange(len(area)) % 2).astype(float)
    regions = RegionWeights(("odd", "even"), np.vstack([area * half, area * (1 - half)]), 0.0)
    opts = IndexOptions(thresholds=(0.0, 1.0), grid_km=15.0, sims=8, param_draws=2,
                        min_casts=20)
    return _qc(df), grid, opts, regions


@pytest.fixture(scope="module")
def serial(survey, box_domain) -> IndexResult:
    casts, grid, opts, regions = survey
    return compute_indices(casts, box_domain, grid, opts, regions=regions, workers=1)


def _assert_same(a: IndexResult, b: IndexResult) -> None:
    assert a.table.to_csv(index=False) == b.table.to_csv(index=False)  # the bytes written
    pd.testing.assert_frame_equal(a.table, b.table, check_exact=True)
    assert np.array_equal(a.estimate, b.estimate, equal_nan=True)
    assert np.array_equal(a.sd, b.sd, equal_nan=True)
    assert a.regions is not None and b.regions is not None
    pd.testing.assert_frame_equal(a.regions, b.regions, check_exact=True)
    pd.testing.assert_frame_equal(a.outliers, b.outliers, check_exact=True)
    assert (a.family, a.family_scores) == (b.family, b.family_scores)
    assert a.draws.keys() == b.draws.keys()
    for yr in a.draws:
        assert np.array_equal(a.draws[yr].areas, b.draws[yr].areas)
        assert np.array_equal(a.draws[yr].region_areas, b.draws[yr].region_areas)


def test_the_fixture_exercises_what_could_differ(serial):
    # Family choice, an outlier refit, simulations, regions and a year without indices.
    t = serial.table.set_index("year")
    assert serial.family_scores and len(serial.outliers) == 1
    assert t["below_0c_km2_sd"].notna().sum() == 3
    assert "fewer than the minimum" in t.loc[2004, "note"]


def test_two_worker_processes_give_the_serial_bytes(survey, serial, box_domain):
    casts, grid, opts, regions = survey
    _assert_same(serial, compute_indices(casts, box_domain, grid, opts, regions=regions,
                                         workers=2))


def test_a_dask_cluster_gives_the_serial_bytes(survey, serial, box_domain):
    distributed = pytest.importorskip("distributed")
    casts, grid, opts, regions = survey
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as cluster:
        res = compute_indices(casts, box_domain, grid, opts, regions=regions, workers=2,
                              scheduler=cluster.scheduler_address)
    _assert_same(serial, res)


def test_a_year_depends_on_nothing_but_itself(survey, box_domain):
    # What lets years run anywhere in any order: dropping a year moves no other year.
    casts, grid, _, regions = survey
    opts = IndexOptions(thresholds=(0.0,), grid_km=15.0, sims=8, param_draws=2, min_casts=20,
                        variogram="exponential")
    full = compute_indices(casts, box_domain, grid, opts, regions=regions).table
    part = compute_indices(casts[casts["year"] != 2001], box_domain, grid, opts,
                           regions=regions, workers=2).table
    pd.testing.assert_frame_equal(full[full["year"] != 2001].reset_index(drop=True), part,
                                  check_exact=True)


@pytest.mark.parametrize("workers", [1, 2])
def test_an_error_in_a_worker_year_is_raised_as_itself(survey, box_domain, workers):
    casts, grid, opts, _ = survey
    casts = casts.copy()
    casts.loc[casts["year"] == 2003, "bottom_c"] = 1.5  # a year a variogram cannot fit
    opts = IndexOptions(thresholds=(0.0,), grid_km=15.0, sims=0, min_casts=20,
                        variogram="exponential")
    with pytest.raises(TooFewDataError, match="all equal"):
        compute_indices(casts, box_domain, grid, opts, workers=workers)


def _fails_on_odd(shared: str, item: int) -> int:
    if item % 2:
        raise InputError(f"{shared}: item {item} is odd; give even ones.")
    return item * 10


def _blas_threads(shared: None, item: int) -> list[int]:
    return [d["num_threads"] for d in threadpool_info() if d["user_api"] == "blas"]


def test_map_years_orders_results_and_passes_errors_intact():
    assert map_years(_fails_on_odd, [4, 2, 8, 6], workers=2, shared="f") == [40, 20, 80, 60]
    with pytest.raises(InputError, match=r"^f: item 3 is odd; give even ones\.$"):
        map_years(_fails_on_odd, [2, 3, 4], workers=2, shared="f")


def _waits_for_news(flag: str, item: int) -> bool:
    """Item 0 ends at once; item 1 waits (up to 20 s) until the caller has heard of it."""
    if item == 0:
        return True
    for _ in range(200):
        if Path(flag).exists():
            return True
        time.sleep(0.1)
    return False


def test_each_year_is_reported_as_it_finishes_not_when_all_have(tmp_path):
    flag = tmp_path / "item 0 reported"
    heard = map_years(_waits_for_news, [0, 1], workers=2, shared=str(flag),
                      on_done=lambda i, _: flag.touch() if i == 0 else None)
    assert heard == [True, True]


@pytest.mark.parametrize("workers", [1, 2])
def test_blas_is_pinned_in_every_mode(workers):
    for threads in map_years(_blas_threads, [0, 1], workers=workers):
        assert threads and set(threads) == {BLAS_THREADS}


def test_progress_counts_every_year_up_to_the_total(survey, box_domain):
    casts, grid, opts, _ = survey
    events: list[ProgressEvent] = []
    res = compute_indices(casts, box_domain, grid, opts, workers=2, progress=events.append)
    family = [e for e in events if e.stage == "family"]
    years = [e for e in events if e.stage == "years"]
    assert [e.stage for e in events] == ["family"] * len(family) + ["years"] * len(years)
    # Each stage opens with done=0, then counts its items one by one.
    assert [e.done for e in family] == list(range(4)) and family[0].total == 3
    assert [e.done for e in years] == list(range(5)) and {e.total for e in years} == {4}
    assert sorted(e.year for e in years[1:]) == res.years == list(YEARS)


def test_progress_clock_gives_elapsed_and_remaining_time():
    now = iter([100.0, 104.0, 106.0, 110.0, 111.0])
    clock = ProgressClock(lambda: next(now))
    assert clock.update(ProgressEvent("family", 0, 2)).remaining_s is None
    s = clock.update(ProgressEvent("family", 1, 2, 2001))
    assert (s.elapsed_s, s.remaining_s) == (4.0, 4.0)
    assert clock.update(ProgressEvent("years", 0, 4)).stage_elapsed_s == 0.0
    s = clock.update(ProgressEvent("years", 1, 4, 2003))
    assert (s.elapsed_s, s.stage_elapsed_s, s.remaining_s) == (10.0, 4.0, 12.0)
    s = clock.update(ProgressEvent("years", 4, 4, 2001))
    assert s.remaining_s == 0.0 and s.label == "mapping survey years"
    with pytest.raises(ValueError, match="stage"):
        ProgressEvent("kriging", 0, 1)


def test_a_scheduler_address_that_cannot_work_is_refused_naming_the_option():
    pytest.importorskip("distributed")
    with pytest.raises(ConfigError, match="^--scheduler: no dask scheduler answered at foo://x"):
        map_years(_fails_on_odd, [2], scheduler="foo://x", shared="f")


def _years_in_a_daemon(queue) -> None:
    try:
        queue.put(map_years(_fails_on_odd, [2, 4], workers=2, shared="f"))
    except BaseException as exc:  # reported to the test, not lost with the process
        queue.put(repr(exc))


def test_a_daemonic_process_runs_its_years_itself():
    # A daemonic process may not start processes (e.g. coldindex inside a worker pool).
    import multiprocessing as mp

    ctx = mp.get_context("spawn")
    queue = ctx.Queue()
    proc = ctx.Process(target=_years_in_a_daemon, args=(queue,), daemon=True)
    proc.start()
    assert queue.get(timeout=120) == [20, 40]
    proc.join(timeout=30)


def _pid_or_sleep(shared: None, item: int) -> int:
    if item < 2:
        return os.getpid()
    time.sleep(300)  # a long year, interrupted
    return -1


_INTERRUPTED_RUN = """
import signal, sys
signal.signal(signal.SIGINT, signal.default_int_handler)  # even when started in background
from coldindex.parallel import map_years
from tests.test_parallel import _pid_or_sleep
try:
    map_years(_pid_or_sleep, [0, 1, 2, 3], workers=2, on_done=lambda i, r: print(r, flush=True))
except KeyboardInterrupt:
    print("interrupted", flush=True)
    sys.exit(130)
"""


def test_ctrl_c_stops_the_workers_and_leaves_no_process_behind():
    psutil = pytest.importorskip("psutil")
    root = Path(__file__).resolve().parents[1]
    proc = subprocess.Popen([sys.executable, "-c", _INTERRUPTED_RUN], cwd=root, text=True,
                            stdout=subprocess.PIPE)
    try:
        assert proc.stdout is not None
        proc.stdout.readline(), proc.stdout.readline()  # two years done: the pool runs
        children = psutil.Process(proc.pid).children(recursive=True)
        assert children
        proc.send_signal(signal.SIGINT)
        out, _ = proc.communicate(timeout=60)
    finally:
        proc.kill()
    assert proc.returncode == 130 and "interrupted" in out
    _, alive = psutil.wait_procs(children, timeout=30)
    assert not alive


def test_fixed_variogram_parameters_hold_every_year_without_draws(survey, box_domain):
    casts, grid, opts, _ = survey
    fixed = IndexOptions(**{**opts.model_dump(), "variogram": "exponential",
                            "variogram_params": (0.8, 30.0, 0.05), "outlier_z": 0.0})
    res = compute_indices(casts, box_domain, grid, fixed, workers=1)
    ok = res.table.dropna(subset=["bottom_mean_c"])
    assert len(ok) == 3  # 2004 has too few casts
    assert set(ok["variogram"]) == {"exponential(sill=0.8,len_km=30,nugget=0.05)"}
    assert res.family_scores == {}  # nothing was fitted or chosen
    with pytest.raises(ConfigError, match="index.variogram needs to be a family"):
        IndexOptions(variogram_params=(1.0, 30.0, 0.1))
    with pytest.raises(ConfigError, match="index.variogram_params needs to be three numbers"):
        IndexOptions(variogram="exponential", variogram_params=(1.0, -30.0, 0.1))
