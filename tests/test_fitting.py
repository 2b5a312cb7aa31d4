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
