"""Fitting a whole store: stream tests from the store, identify them, store the fits.

The store is read one test at a time and fits are written in small transactions, so a
campaign is never held in memory at once and an interrupted run leaves only whole fits;
a re-run picks up the tests still without a fit. Large campaigns are spread over every
core with a process pool (the store itself is only touched by the calling process).
"""

from __future__ import annotations

import os
from collections import deque
from collections.abc import Callable, Iterator
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field

import numpy as np

from .identify import METHODS, identify
from .store import Store

BATCH = 32
PARALLEL_FROM = 24  # below this many tests a process pool costs more than it saves


@dataclass
class FitSummary:
    fitted: int = 0
    quality: dict[str, int] = field(default_factory=lambda: {"good": 0, "suspect": 0, "rejected": 0})
    workers: int = 1

    def lines(self) -> list[str]:
        q = self.quality
        return [f"fitted {self.fitted} test(s) on {self.workers} worker(s): {q['good']} good, "
                f"{q['suspect']} suspect, {q['rejected']} rejected"]


def _ranges(info: dict) -> tuple[tuple[float, float] | None, tuple[float, float] | None]:
    def pair(low, high):
        if low is None or high is None or not np.isfinite(low) or not np.isfinite(high):
            return None
        return float(low), float(high)
    return (pair(info.get("input_range_low"), info.get("input_range_high")),
            pair(info.get("output_range_low"), info.get("output_range_high")))


def fit_one(job: tuple) -> dict:
    """Identify one test; ``job`` is (test_id, t, u, y, input_range, output_range, method)."""
    test_id, t, u, y, input_range, output_range, method = job
    result = identify(t, u, y, method=method, input_range=input_range, output_range=output_range)
    row = result.to_row()
    row["notes"] = list(getattr(result, "notes", ()) or ())
    # kept so the fitted curve can be redrawn from the store without refitting
    row["settings"] = {**row.get("settings", {}), "offset": result.offset,
                       "input_before": result.input_before}
    row["test_id"] = test_id
    return row


def _jobs(store: Store, test_ids: list[int], method: str) -> Iterator[tuple]:
    # read in batches: few queries, yet never the whole campaign in memory
    for first in range(0, len(test_ids), BATCH):
        chunk = test_ids[first:first + BATCH]
        infos = store.fit_inputs(chunk)
        samples = store.samples_many(chunk)
        for test_id in chunk:
            t, u, y = samples[test_id]
            input_range, output_range = _ranges(infos.get(test_id, {}))
            yield (test_id, t, u, y, input_range, output_range, method)


def fit_store(store: Store, *, refit: bool = False, method: str = "least_squares",
              workers: int | None = None,
              progress: Callable[[int, int], None] | None = None) -> FitSummary:
    """Identify every test of ``store`` that has no fit yet (all of them with ``refit``).

    Parameters
    ----------
    store : Store
        An open, writable store.
    refit : bool, default False
        Redo every test, replacing earlier fits.
    method : str, default "least_squares"
        One of :data:`mapper.identify.METHODS`.
    workers : int, optional
        Processes to use; default all cores for large campaigns, one for small ones.
    """
    if method not in METHODS:
        from .errors import MapperError
        raise MapperError(f"unknown method '{method}'", hint="choose one of " + ", ".join(METHODS))
    test_ids = store.test_ids(unfitted_only=not refit)
    total = len(test_ids)
    if workers is None:
        workers = (os.cpu_count() or 1) if total >= PARALLEL_FROM else 1
    workers = max(1, min(workers, total or 1))
    summary = FitSummary(workers=workers)
    batch: list[dict] = []

    def take(row: dict) -> None:
        batch.append(row)
        summary.fitted += 1
        summary.quality[row.get("quality") or "rejected"] = summary.quality.get(row.get("quality") or "rejected", 0) + 1
        if progress:
            progress(summary.fitted, total)
        if len(batch) >= BATCH:
            store.save_fits(batch)
            batch.clear()

    jobs = _jobs(store, test_ids, method)
    if workers == 1:
        for job in jobs:
            take(fit_one(job))
    else:
        with ProcessPoolExecutor(max_workers=workers) as pool:
            # a bounded queue of pending jobs keeps memory flat however large the campaign
            pending: deque = deque()
            for job in jobs:
                pending.append(pool.submit(fit_one, job))
                if len(pending) >= 4 * workers:
                    take(pending.popleft().result())
            while pending:
                take(pending.popleft().result())
    if batch:
        store.save_fits(batch)
    return summary
