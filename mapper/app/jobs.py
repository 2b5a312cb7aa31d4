"""Jobs that combine several modules: what the map, at, verdict, compare, report and demo
commands do. Each takes a store path (or an open :class:`~mapper.app.session.Session`) and
plain options and returns plain results, so the command line stays thin and notebooks can
call the same functions. Inside one job the store is opened once and the map, verdict and
comparisons are built once (the session caches them).
"""

from __future__ import annotations

import shutil
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from mapper.analysis.opmap import OperatingMap
from mapper.analysis.verdict import Verdict
from mapper.app.session import AGAINST, CampaignData, Session, campaign_data
from mapper.app.session import finite_or_none as _finite
from mapper.errors import NotFoundError
from mapper.identification.identify import FitResult
from mapper.store.database import Store

__all__ = ["AGAINST", "CampaignData", "SAFETY_NOTE", "Session", "analyse_store", "compare_two",
           "comparisons", "operating_map", "parameters_at", "run_demo", "verdict_for",
           "write_campaign_report", "campaign_data"]

SAFETY_NOTE = ("Step tests and new tuning can hurt people and equipment: agree limits with "
               "operations, stay clear of alarm and trip limits, verify settings before use, and "
               "follow site procedures and licensed practice.")

Progress = Callable[[int, int, str], None]



@contextmanager
def reading(source) -> Iterator[Session]:
    """A session on ``source``: an open session is used as it is, a path is opened read-only."""
    if isinstance(source, Session):
        yield source
        return
    with Session(source) as session:
        yield session


def operating_map(store_path, *, campaign: str | None = None, against: str = "level",
                  influence: bool = True) -> tuple[CampaignData, OperatingMap]:
    """The operating map of a campaign (trends of gain, time constant, dead time, K/tau).

    With ``influence`` (default) the map carries the single tests its conclusions hang on
    (:func:`mapper.analysis.influence.with_influence`; ``depends_on`` in its summary rows).

    ``against="level"`` maps against the operating level in output units (the brief's
    definition); ``against="input"`` against the input's operating value instead (the mean
    of its settled values before and after each move), e.g. a valve position. Excluded tests
    are left out. With several campaigns in the store one must be named.
    """
    with reading(store_path) as session:
        return session.operating_map(campaign, against=against, influence=influence)


def parameters_at(store_path, level: float, *, campaign: str | None = None,
                  extrapolate: bool = False, against: str = "level") -> dict:
    """Gain, time constant and dead time at ``level`` with their 95 % band."""
    _, opmap = operating_map(store_path, campaign=campaign, against=against, influence=False)
    return opmap.at(level, extrapolate=extrapolate)


def verdict_for(store_path, *, campaign: str | None = None, ms_max: float = 2.0,
                slowdown_max: float = 2.0, closed_loop_time: float | None = None,
                rule: str = "simc", schedule_out: Path | None = None) -> tuple[CampaignData, Verdict]:
    """Single controller or schedule for a campaign; optionally write the schedule CSV."""
    with reading(store_path) as session:
        data, verdict = session.verdict(campaign, ms_max=ms_max, slowdown_max=slowdown_max,
                                        closed_loop_time=closed_loop_time, rule=rule)
    if schedule_out is not None:
        verdict.write_schedule_csv(Path(schedule_out), units=data.units)
    return data, verdict


def comparisons(store_path, *, campaign: str | None = None) -> list[dict]:
    """Repeats and up-against-down comparisons inside one campaign."""
    with reading(store_path) as session:
        return session.comparisons(campaign)


def compare_two(store_path, first: str, second: str) -> list[dict]:
    """Campaign ``first`` against ``second``: which parameters moved, where, how significantly."""
    with reading(store_path) as session:
        return session.compare_two(first, second)


def _fitted_curve(fit: dict | None, t: np.ndarray, u: np.ndarray) -> np.ndarray | None:
    if not fit or fit.get("model") not in ("fopdt", "integrating") or len(t) < 2:
        return None
    curve = FitResult.from_row(fit).fitted(t, u)
    return curve if np.isfinite(curve).any() else None


def _iter_tests(store: Store, params: pd.DataFrame, *, batch: int = 32):
    """Per-test items for the report, in report order, read from the store lazily.

    The params rows are sorted first (rejected, suspect, good, then by level; see
    :func:`mapper.presentation.report.test_sort_key`); samples are then read a small batch of tests at
    a time, so at most ``batch`` tests' samples are in memory whatever the campaign size.
    """
    from mapper.presentation.report import test_sort_key
    records: list[dict] = params.to_dict("records")
    rows = sorted(records, key=test_sort_key)
    for start in range(0, len(rows), batch):
        chunk = rows[start:start + batch]
        ids = [int(row["test_id"]) for row in chunk]
        samples = store.samples_many(ids)
        fits = store.fit_details_many(ids)
        notes = store.test_notes(ids)
        for row in chunk:
            test_id = int(row["test_id"])
            if test_id not in samples:
                raise NotFoundError(f"test {test_id} has no samples in {store.path}")
            t, u, y = samples.pop(test_id)
            fit = fits.pop(test_id, None)
            item = dict(row)
            # the params row's note carries later notes too (with their time); the file's otherwise
            item.update(note=row.get("note") or notes.get(test_id, ""), t=t, u=u, y=y,
                        fitted=_fitted_curve(fit, t, u),
                        step_time=_finite(fit.get("step_time")) if fit else None)
            yield item


@dataclass
class ReportOutcome:
    path: Path
    size_bytes: int
    png_files: tuple = ()
    verdict: Verdict | None = None


def write_campaign_report(store_path, out: Path, *, campaign: str | None = None,
                          png_dir: Path | None = None, ms_max: float = 2.0,
                          slowdown_max: float = 2.0, compare_with: str | None = None,
                          schedule_out: Path | None = None, prepared_by: str | None = None,
                          checked_by: str | None = None,
                          progress: Progress | None = None) -> ReportOutcome:
    """The self-contained HTML report of a campaign (and PNG charts when ``png_dir``; the
    schedule CSV too when ``schedule_out``); ``prepared_by`` and ``checked_by`` fill the
    record block. The store is opened once for the whole report."""
    from mapper.presentation.report import write_report
    with reading(store_path) as session:
        data, verdict = verdict_for(session, campaign=campaign, ms_max=ms_max,
                                    slowdown_max=slowdown_max, schedule_out=schedule_out)
        _, opmap = session.operating_map(data.name)
        found = list(session.comparisons(data.name))
        if compare_with:
            found += session.compare_two(compare_with, data.name)
        summary: dict = {"name": data.name, "n_tests": int(len(data.params)), "units": data.units}
        if data.description:
            summary["description"] = data.description
        for quality in ("good", "suspect", "rejected"):
            summary[f"{quality} tests"] = int((data.params["quality"] == quality).sum())
        if "excluded" in data.params.columns:
            summary["excluded tests"] = int(data.params["excluded"].fillna(False).astype(bool).sum())
        if data.note:
            summary["note"] = data.note
        tests = _iter_tests(session.store, data.params)
        if progress is not None:
            tests = _counted(tests, len(data.params), progress, "writing the report")
        # tests stream from the store into the file one at a time
        info = write_report(out, campaign=summary, params=data.params, trend=opmap.trend_frame(),
                            map_summary=opmap.summary(), verdict=verdict.report_dict(),
                            comparisons=found, tests=tests,
                            png_dir=png_dir, prepared_by=prepared_by, checked_by=checked_by)
    return ReportOutcome(Path(info.path), info.size_bytes, tuple(info.png_files), verdict)


def _counted(items, total: int, progress: Progress, label: str):
    for done, item in enumerate(items, start=1):
        yield item
        progress(done, total, label)


def analyse_store(store_path, *, out_dir: Path, campaign: str | None = None) -> ReportOutcome:
    """Verdict, schedule CSV and report for a fitted store (used by demo and bench)."""
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    return write_campaign_report(store_path, out_dir / "report.html", campaign=campaign,
                                 schedule_out=out_dir / "schedule.csv")


def sample_campaign_folder() -> Path:
    """The sample campaign shipped inside the package (package data, in wheels too)."""
    from mapper.demo.sample import sample_campaign_folder as packaged
    return packaged()


@dataclass
class DemoOutcome:
    folder: Path
    store: Path
    report: Path
    schedule: Path
    pngs: tuple
    seconds: float
    lines: list[str]


def run_demo(out_dir: Path, *, png: bool = False, progress: Progress | None = None) -> DemoOutcome:
    """The whole job on the sample campaign, into a fresh store inside ``out_dir``.

    Never touches any other store: the demo store lives in ``out_dir`` and is replaced on
    each run. The store is opened once for the whole demo (import, fit, map, verdict,
    comparisons and report share one session).
    """
    from mapper.identification.fitting import fit_store
    from mapper.presentation.output import format_records
    from mapper.store.ingest import import_sources
    started = time.perf_counter()
    source = sample_campaign_folder()
    folders = sorted(p for p in source.iterdir() if (p / "campaign.toml").is_file()) if source.is_dir() else []
    if not folders:
        raise NotFoundError(f"the sample campaign is missing ({source})",
                            hint="reinstall mapper; the sample campaign ships inside the package")
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    db = out_dir / "demo.duckdb"
    for stale in (db, out_dir / "demo.duckdb.wal"):
        if stale.exists():
            stale.unlink()
    lines: list[str] = []
    png_dir = out_dir / "charts" if png else None
    if png_dir is not None and png_dir.exists():
        shutil.rmtree(png_dir)
    with Session(db, write=True, create=True) as session:
        store = session.store
        summary = import_sources(store, folders, progress=progress)
        lines += summary.lines()
        fitted = fit_store(store, progress=(lambda done, total: progress(done, total, "fitting"))
                           if progress else None)
        lines += fitted.lines()
        session.forget()
        names = session.campaign_names()
        newest = names[-1]
        _, opmap = session.operating_map(newest, influence=False)
        lines += ["", f"Operating map of '{newest}':"]
        lines += format_records(opmap.summary(), "table", kind="map").splitlines()
        report = write_campaign_report(session, out_dir / "report.html", campaign=newest, png_dir=png_dir,
                                       compare_with=names[0] if len(names) > 1 else None,
                                       schedule_out=out_dir / "schedule.csv", progress=progress)
        result = report.verdict.to_dict() if report.verdict is not None else {}
        lines += ["", f"Verdict: {result.get('decision')} (campaign '{newest}')"]
        lines += [f"  - {r}" for r in result.get("reasons", [])]
        if report.verdict is not None and report.verdict.depends_on_sentence:
            lines += [f"  - {report.verdict.depends_on_sentence}"]
        if len(names) > 1:
            moved = session.compare_two(names[0], newest)
            lines += ["", f"'{names[0]}' against '{newest}':"] + [f"  - {m['sentence']}" for m in moved[:6]]
    seconds = time.perf_counter() - started
    lines += ["", f"store:    {db}", f"report:   {report.path} ({report.size_bytes / 1e6:.1f} MB)",
              f"schedule: {out_dir / 'schedule.csv'}"]
    if report.png_files:
        lines.append(f"charts:   {len(report.png_files)} PNG files in {png_dir}")
    lines += [f"done in {seconds:.1f} s", "", SAFETY_NOTE]
    return DemoOutcome(out_dir, db, report.path, out_dir / "schedule.csv", report.png_files, seconds, lines)
