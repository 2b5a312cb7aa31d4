"""Batch fitting of a store: the process pool gives the fits one process gives, and starts
only where there are idle cores (no timing asserted: speed is shown by ``mapper bench``)."""

from __future__ import annotations

import os

import numpy as np
from conftest import write_campaign

from mapper.identification.fitting import PARALLEL_FROM, fit_store, idle_cores
from mapper.store.database import Store
from mapper.store.ingest import import_sources


def test_the_pool_gives_the_fits_one_process_gives(tmp_path):
    tests = [{"gain": 1.0 + 0.05 * i, "time_constant": 8.0 + i % 7, "level": 20 + i} for i in range(PARALLEL_FROM + 6)]
    folder = write_campaign(tmp_path / "campaign", tests)
    with Store(tmp_path / "s.duckdb") as store:
        import_sources(store, [folder])
        one = fit_store(store, workers=1)
        serial = store.params().sort_values("test_id").reset_index(drop=True)
        two = fit_store(store, refit=True, workers=2)
        pooled = store.params().sort_values("test_id").reset_index(drop=True)
    assert one.fitted == two.fitted == len(tests) and two.workers == 2
    for name in ("gain", "gain_lo", "gain_hi", "time_constant", "dead_time", "quality"):
        assert serial[name].tolist() == pooled[name].tolist(), name
    # and the fits are the right ones (textbook FOPDT step responses, 2 % noise)
    np.testing.assert_allclose(pooled["gain"], [t["gain"] for t in tests], rtol=0.03)


def test_idle_cores_counts_the_idle_share_of_the_usable_cores(monkeypatch):
    import mapper.identification.fitting as fitting

    usable = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count()
    readings = iter([])
    monkeypatch.setattr(fitting, "_cpu_times", lambda: next(readings))
    monkeypatch.setattr(fitting.time, "sleep", lambda seconds: None)

    def cores(idle_jiffies: int, total_jiffies: int) -> int:
        nonlocal readings
        readings = iter([(1000, 5000), (1000 + idle_jiffies, 5000 + total_jiffies)])
        return idle_cores()

    assert cores(100, 100) == usable  # all idle
    assert cores(0, 100) == 1  # every core busy: fit in this process
    if usable >= 2:
        assert cores(int(100 * 1.4 / usable), 100) == 1  # 1.4 cores idle: less than two
        assert cores(int(100 * 2.0 / usable), 100) == 2
    readings = iter([None])
    assert idle_cores() == usable  # no /proc/stat: every usable core
    # the real reading on this machine is within range
    monkeypatch.undo()
    assert 1 <= idle_cores() <= usable


def _slow_first_chunk(jobs):
    import time

    from mapper.identification import fitting
    if os.getpid() != fitting._PARENT and jobs[0][0] == 0:  # the helper's first chunk lags
        time.sleep(0.5)
    return [{"test_id": job[0]} for job in jobs]


def test_rows_come_back_in_the_order_of_the_tests(monkeypatch):
    """While the helper is busy the calling process fits chunks itself; their rows still wait
    behind the helper's, so a file's windows reach the judgement together and in order."""
    from mapper.identification import fitting

    assert fitting._pool_context() is not None  # forked helpers (Linux), which see the patched chunk fitter
    monkeypatch.setattr(fitting, "_PARENT", os.getpid(), raising=False)
    monkeypatch.setattr(fitting, "fit_chunk", _slow_first_chunk)
    seen: list[int] = []
    jobs = iter([(i,) for i in range(40)])
    fitting._fit_jobs(jobs, lambda row: seen.append(row["test_id"]), workers=2, total=40)
    assert seen == list(range(40))


def test_the_pool_keeps_a_files_windows_together_for_their_judgement(tmp_path):
    """A long log whose windows are judged against each other (a dead time of 20 s, moves
    20-60 s apart) gets the same grades and flags from the pool as from one process: rows
    reach the judgement in the order of the tests, whichever process fitted them."""
    from plants import LinearPlant, by_exception, move_sequence, simulate

    plant = LinearPlant("linear", dead_time=20.0, gain=2.0, time_constant=40.0)
    paths = []
    for seed in range(3):
        rng = np.random.default_rng(seed)
        times, levels, end = move_sequence(rng, plant, 20.0, 4.0, 10, first=150.0)
        td, ud, yd = simulate(plant, times, levels, end)
        ts, us, ys = by_exception(td, ud, yd, 0.024, rng, dead_band=0.024, max_interval=10.0, period=1.0)
        path = tmp_path / f"log_{seed}.csv"
        np.savetxt(path, np.column_stack([ts - ts[0], us, ys]), delimiter=",", header="time,valve,flow",
                   comments="", fmt="%.9g")
        paths.append(path)
    with Store(tmp_path / "s.duckdb") as store:
        import_sources(store, paths, time_column="time", input_column="valve", output_column="flow",
                       period=1.0, campaign="logs")
        fit_store(store, workers=1)
        serial = store.params().sort_values("test_id")[["quality", "flags"]].to_dict("records")
        fit_store(store, refit=True, workers=2)
        pooled = store.params().sort_values("test_id")[["quality", "flags"]].to_dict("records")
    assert any("response_cut_by_next_move" in (row["flags"] or []) for row in serial)
    assert [(r["quality"], list(r["flags"] or [])) for r in serial] == [(r["quality"], list(r["flags"] or [])) for r in pooled]
