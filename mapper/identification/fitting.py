"""Fitting a whole store: stream tests from the store, identify them, store the fits.

The store is read in batches of tests and fits are written in small transactions, so a
campaign is never held in memory at once and an interrupted run leaves only whole fits;
a re-run picks up the tests still without a fit. Large campaigns are spread over every
core with a process pool (the store itself is only touched by the calling process); each
job carries a chunk of tests, so the cost of handing work to a process is paid per
chunk, and only a few chunks are in flight at once, so memory stays flat.
"""

from __future__ import annotations

import multiprocessing
import os
import sys
import time
from collections import deque
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field

import numpy as np
from threadpoolctl import threadpool_limits

from mapper.constants import MIN_BASELINE_SAMPLES
from mapper.identification.identify import ESTIMATORS, identify
from mapper.identification.record import judge_file
from mapper.store.database import Store

BATCH = 64  # tests read from the store per query
SAVE_BATCH = 256  # fits written per transaction (each costs tens of ms whatever its size)
SAVE_EVERY_SECONDS = 2.0  # ...but commit at least this often, so a killed run keeps its work
PARALLEL_FROM = 24  # below this many tests a process pool costs more than it saves
CHUNK = 8  # tests per job sent to a worker process
IN_FLIGHT_PER_WORKER = 2  # jobs queued per worker: keeps workers busy, memory flat


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
    """Identify one test; ``job`` is (test_id, t, u, y, input_range, output_range, method)
    with, optionally, the test's import flags (they feed the grade) and the preceding
    record ``(t, u)`` of the same file (the model is simulated over it) as eighth and
    ninth items."""
    test_id, t, u, y, input_range, output_range, method = job[:7]
    import_flags = tuple(job[7]) if len(job) > 7 and job[7] is not None else ()
    preceding = job[8] if len(job) > 8 else None
    result = identify(t, u, y, method=method, input_range=input_range, output_range=output_range,
                      import_flags=import_flags, preceding=preceding)
    row = result.to_row()
    row["test_id"] = test_id
    return row


def fit_chunk(jobs: list[tuple]) -> list[dict]:
    """Identify a chunk of tests in a worker process (see :func:`fit_one`)."""
    return [fit_one(job) for job in jobs]


def _chunks(jobs: Iterator[tuple], size: int) -> Iterator[list[tuple]]:
    chunk: list[tuple] = []
    for job in jobs:
        chunk.append(job)
        if len(chunk) >= size:
            yield chunk
            chunk = []
    if chunk:
        yield chunk


def idle_cores(sample_seconds: float = 0.05) -> int:
    """Cores free for fitting now: the usable cores times the share of CPU time left idle.

    A worker pool pays only when there are idle cores to run it; on a machine whose other
    cores are busy it adds process start-up and hand-over for nothing (measured on 2 loaded
    cores: two workers 2.14 against one 2.06 ms per test at 300 tests, 3.9 against 2.4 at
    48). The idle share is read from ``/proc/stat`` twice, ``sample_seconds`` apart (Linux);
    the load average would do elsewhere but lags by a minute, so work that has just ended
    (the import before a fit) would keep the pool from starting. Without ``/proc/stat`` every
    usable core counts.
    """
    try:
        usable = len(os.sched_getaffinity(0))
    except AttributeError:  # not on every platform
        usable = os.cpu_count() or 1
    first = _cpu_times()
    if first is None:
        return usable
    time.sleep(sample_seconds)
    second = _cpu_times()
    if second is None or second[1] <= first[1]:
        return usable
    idle_share = (second[0] - first[0]) / (second[1] - first[1])
    return max(1, min(usable, int(usable * idle_share + 0.5)))


def _cpu_times() -> tuple[int, int] | None:
    """(idle, total) jiffies of all CPUs from ``/proc/stat``, or None where it is missing."""
    try:
        with open("/proc/stat", encoding="ascii") as stat:
            fields = [int(v) for v in stat.readline().split()[1:]]
    except (OSError, ValueError):
        return None
    if len(fields) < 4:
        return None
    return fields[3] + (fields[4] if len(fields) > 4 else 0), sum(fields[:8])


def _pool_context():
    # fork starts a worker in milliseconds with the package already imported; other
    # start methods re-import numpy and scipy in every worker. Workers never touch the
    # store, so the parent's open database is of no concern to them.
    if sys.platform.startswith("linux"):
        return multiprocessing.get_context("fork")
    return None


@dataclass
class _PreviousWindow:
    """The last window handed out, kept so the next window of the same file finds its
    preceding record without another query (windows of a file have consecutive ids)."""

    source_hash: str | None = None
    window_index: int = -1
    window_start: float = 0.0
    period: float = 0.0
    t: np.ndarray = field(default_factory=lambda: np.empty(0))
    u: np.ndarray = field(default_factory=lambda: np.empty(0))


def _preceding(store: Store, test_id: int, info: dict, previous: _PreviousWindow):
    """Times (relative to this window's first sample) and input of the record before the
    window, or None for a file's first window.

    Only the tail the fit uses is needed (see ``identify``): the previous window serves
    when it is long enough, otherwise the store is asked for the whole earlier record.
    """
    index = info.get("window_index")
    if not index:  # a file's first (or only) window
        return None
    if previous.source_hash == info.get("source_hash") and previous.window_index == index - 1:
        start = float(info.get("window_start") or 0.0)
        t = previous.t + previous.window_start - start
        keep = t < -0.25 * previous.period  # the shared plateau appears once
        needed = max(int(info.get("move_start_index") or 0), 3 * MIN_BASELINE_SAMPLES)
        if int(keep.sum()) >= needed:
            return t[keep], previous.u[keep]
    t, u, _ = store.preceding_record(test_id)
    return (t, u) if t.size else None


class _ByFile:
    """Holds the fit rows of one file's windows until the file is done, then judges its moves
    against each other (:func:`mapper.identification.record.judge_file`) and passes them on.

    Windows of a file have consecutive ids, so a file is done when a row of another arrives.
    """

    def __init__(self, take: Callable[[dict], None]):
        self.take = take
        self.source: str | None = None
        self.rows: list[dict] = []
        self.after_move: list[float | None] = []

    def add(self, row: dict, source: str | None, after_move: float | None) -> None:
        if source != self.source:
            self.flush()
            self.source = source
        if source is None:
            self.take(row)
            return
        self.rows.append(row)
        self.after_move.append(after_move)

    def flush(self) -> None:
        for row in judge_file(self.rows, self.after_move) if len(self.rows) > 1 else self.rows:
            self.take(row)
        self.source, self.rows, self.after_move = None, [], []


def _jobs(store: Store, test_ids: list[int], method: str,
          files: dict[int, tuple[str | None, float | None]]) -> Iterator[tuple]:
    # read in batches: few queries, yet never the whole campaign in memory; ``files`` gets
    # each test's file and how long its window runs after its own move
    previous = _PreviousWindow()
    for first in range(0, len(test_ids), BATCH):
        chunk = test_ids[first:first + BATCH]
        infos = store.fit_inputs(chunk)
        samples = store.samples_many(chunk)
        for test_id in chunk:
            t, u, y = samples[test_id]
            info = infos.get(test_id, {})
            input_range, output_range = _ranges(info)
            preceding = _preceding(store, test_id, info, previous)
            move = info.get("move_start_time")
            files[test_id] = (info.get("source_hash"),
                              float(t[-1] - move) + float(info.get("period") or 0.0) if move is not None and t.size
                              else None)
            previous = _PreviousWindow(info.get("source_hash"), int(info.get("window_index") or 0),
                                       float(info.get("window_start") or 0.0), float(info.get("period") or 0.0),
                                       t, u)
            yield (test_id, t, u, y, input_range, output_range, method,
                   tuple(info.get("import_flags") or ()), preceding)


def fit_store(store: Store, *, refit: bool = False, method: str = "least_squares",
              workers: int | None = None, test_ids: Sequence[int] | None = None,
              progress: Callable[[int, int], None] | None = None) -> FitSummary:
    """Identify every test of ``store`` that has no fit yet (all of them with ``refit``).

    With ``test_ids`` only those tests are considered (the command line passes the named
    campaign's tests or the ids given, so a refit never silently spans the whole store).

    Parameters
    ----------
    store : Store
        An open, writable store.
    refit : bool, default False
        Redo every test, replacing earlier fits.
    method : str, default "least_squares"
        One of :data:`mapper.identification.identify.ESTIMATORS`.
    test_ids : sequence of int, optional
        The tests to consider (default every test of the store).
    workers : int, optional
        Processes to use, the calling one included (it reads, writes and fits while
        ``workers - 1`` helpers fit); default the idle cores (:func:`idle_cores`) for
        campaigns of ``PARALLEL_FROM`` tests or more, one for smaller ones.
    """
    if method not in ESTIMATORS:
        from mapper.errors import MapperError
        raise MapperError(f"unknown method '{method}'", hint="choose one of " + ", ".join(ESTIMATORS))
    candidates = store.test_ids(unfitted_only=not refit)
    if test_ids is not None:
        wanted = {int(i) for i in test_ids}
        candidates = [i for i in candidates if i in wanted]
    test_ids = candidates
    total = len(test_ids)
    if workers is None:
        workers = idle_cores() if total >= PARALLEL_FROM else 1
    workers = max(1, min(workers, total or 1))
    summary = FitSummary(workers=workers)
    batch: list[dict] = []
    last_save = time.monotonic()

    def take(row: dict) -> None:
        nonlocal last_save
        batch.append(row)
        summary.fitted += 1
        summary.quality[row.get("quality") or "rejected"] = summary.quality.get(row.get("quality") or "rejected", 0) + 1
        if progress:
            progress(summary.fitted, total)
        if len(batch) >= SAVE_BATCH or time.monotonic() - last_save > SAVE_EVERY_SECONDS:
            store.save_fits(batch)
            batch.clear()
            last_save = time.monotonic()

    files: dict[int, tuple[str | None, float | None]] = {}
    by_file = _ByFile(take)

    def arrive(row: dict) -> None:
        source, after_move = files.pop(int(row["test_id"]), (None, None))
        by_file.add(row, source, after_move)

    with threadpool_limits(limits=1, user_api="blas"):  # small matrices: threads only cost
        _fit_jobs(_jobs(store, test_ids, method, files), arrive, workers, total)
    by_file.flush()
    if batch:
        store.save_fits(batch)
    return summary


def _fit_jobs(jobs: Iterator[tuple], take: Callable[[dict], None], workers: int, total: int) -> None:
    """Fit ``jobs`` here (one worker) or spread over a process pool, handing each row to ``take``."""
    if workers == 1:
        for job in jobs:
            take(fit_one(job))
    else:
        # chunks small enough that every process gets several, large enough to amortise
        size = max(1, min(CHUNK, total // (2 * workers)))
        helpers = workers - 1  # the calling process reads, writes and fits too
        in_flight = IN_FLIGHT_PER_WORKER * helpers
        with ProcessPoolExecutor(max_workers=helpers, mp_context=_pool_context()) as pool:
            # a bounded queue of pending chunks keeps memory flat however large the campaign;
            # rows are handed on in the order of the tests (a file's windows stay together)
            pending: deque = deque()
            for chunk in _chunks(jobs, size):
                while pending and (pending[0].done() or len(pending) >= 2 * in_flight):
                    for row in pending.popleft().result():
                        take(row)
                if sum(not item.done() for item in pending) < in_flight:
                    pending.append(pool.submit(fit_chunk, chunk))
                else:  # every helper is busy: fit this chunk here rather than wait
                    pending.append(_Fitted(fit_chunk(chunk)))
            while pending:
                for row in pending.popleft().result():
                    take(row)


class _Fitted:
    """A chunk fitted in this process, queued behind the ones still with the helpers."""

    def __init__(self, rows: list[dict]):
        self.rows = rows

    def done(self) -> bool:
        return True

    def result(self) -> list[dict]:
        return self.rows
