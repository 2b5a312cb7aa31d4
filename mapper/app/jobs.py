"""Jobs that combine several modules: what the map, at, verdict, compare, report and demo
commands do. Each takes a store path and plain options and returns plain results, so the
command line stays thin and notebooks can call the same functions.
"""

from __future__ import annotations

import shutil
import time
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any, cast

import numpy as np
import pandas as pd

from mapper.analysis.compare import compare_campaigns, compare_directions, compare_repeats
from mapper.analysis.influence import verdict_influence, with_influence
from mapper.analysis.opmap import OperatingMap, build_map
from mapper.analysis.verdict import Verdict, decide
from mapper.errors import MapperError, NotFoundError
from mapper.identification.identify import FitResult
from mapper.store.database import Store

SAFETY_NOTE = ("Step tests and new tuning can hurt people and equipment: agree limits with "
               "operations, stay clear of alarm and trip limits, verify settings before use, and "
               "follow site procedures and licensed practice.")


@dataclass
class CampaignData:
    """One campaign's rows of ``test_params`` with its units and instrument ranges."""

    name: str
    params: pd.DataFrame
    units: dict
    ranges: dict
    note: str = ""


def _finite(value) -> float | None:
    try:
        value = float(value)
    except (TypeError, ValueError):
        return None
    return value if np.isfinite(value) else None


def load_campaign_data(store: Store, campaign: str | None = None) -> CampaignData:
    """The named campaign, or the newest one when the store holds several."""
    campaigns = store.campaign_info()
    if not campaigns:
        raise NotFoundError(f"{store.path}: the store holds no campaign yet",
                            hint="run 'mapper import FOLDER' and 'mapper fit' first")
    note = ""
    if campaign is None:
        info = campaigns[-1]
        if len(campaigns) > 1:
            note = (f"campaign '{info['name']}' (newest of {len(campaigns)}; choose another "
                    "with --campaign)")
    else:
        matches = [c for c in campaigns if c["name"] == campaign]
        if not matches:
            names = ", ".join(repr(c["name"]) for c in campaigns)
            raise NotFoundError(f"campaign '{campaign}' is not in {store.path}",
                                hint=f"campaigns stored: {names}")
        info = matches[0]
    params = store.params(campaign=info["name"])
    if params["quality"].isna().all():
        raise MapperError(f"campaign '{info['name']}' has no fitted tests",
                          hint="run 'mapper fit' first")
    units = {"input": info.get("input_unit") or "", "output": info.get("output_unit") or ""}
    ranges = {}
    for side in ("input", "output"):
        low, high = _finite(info.get(f"{side}_range_low")), _finite(info.get(f"{side}_range_high"))
        if low is not None and high is not None:
            ranges[side] = [low, high]
    return CampaignData(info["name"], params, units, ranges, note)


AGAINST = {"level": "level", "input": "input_level"}


def operating_map(store_path, *, campaign: str | None = None, against: str = "level",
                  influence: bool = True) -> tuple[CampaignData, OperatingMap]:
    """The operating map of a campaign (trends of gain, time constant, dead time, K/tau).

    With ``influence`` (default) the map carries the single tests its conclusions hang on
    (:func:`mapper.analysis.influence.with_influence`; ``depends_on`` in its summary rows).

    ``against="level"`` maps against the operating level in output units (the brief's
    definition); ``against="input"`` against the input's operating value instead (the mean
    of its settled values before and after each move), e.g. a valve position.
    """
    if against not in AGAINST:
        raise MapperError(f"cannot map against '{against}'", hint="use level or input")
    with Store(store_path, read_only=True) as store:
        data = load_campaign_data(store, campaign)
        if against == "input":
            levels = store.input_levels()
            data.params["input_level"] = [levels.get(int(i), np.nan) for i in data.params["test_id"]]
    opmap = build_map(data.params, against=AGAINST[against])
    return data, (with_influence(opmap, data.params) if influence else opmap)


def parameters_at(store_path, level: float, *, campaign: str | None = None,
                  extrapolate: bool = False, against: str = "level") -> dict:
    """Gain, time constant and dead time at ``level`` with their 95 % band."""
    _, opmap = operating_map(store_path, campaign=campaign, against=against, influence=False)
    return opmap.at(level, extrapolate=extrapolate)


def verdict_for(store_path, *, campaign: str | None = None, ms_max: float = 2.0,
                slowdown_max: float = 2.0, closed_loop_time: float | None = None,
                rule: str = "simc", schedule_out: Path | None = None) -> tuple[CampaignData, Verdict]:
    """Single controller or schedule for a campaign; optionally write the schedule CSV."""
    data, opmap = operating_map(store_path, campaign=campaign)
    verdict = decide(data.params, ms_max=ms_max, slowdown_max=slowdown_max,
                     closed_loop_time=closed_loop_time, ranges=data.ranges or None, rule=rule,
                     opmap=opmap)
    depends = verdict_influence(data.params, decision=verdict.decision, opmap=opmap, ms_max=ms_max,
                                slowdown_max=slowdown_max, closed_loop_time=closed_loop_time,
                                ranges=data.ranges or None, rule=rule)
    verdict = replace(verdict, depends_on=depends.entries, depends_on_sentence=depends.sentence)
    if schedule_out is not None:
        verdict.write_schedule_csv(Path(schedule_out), units=data.units)
    return data, verdict


def comparisons(store_path, *, campaign: str | None = None) -> list[dict]:
    """Repeats and up-against-down comparisons inside one campaign."""
    with Store(store_path, read_only=True) as store:
        data = load_campaign_data(store, campaign)
    return compare_repeats(data.params) + compare_directions(data.params)


def compare_two(store_path, first: str, second: str) -> list[dict]:
    """Campaign ``first`` against ``second``: which parameters moved, where, how significantly."""
    with Store(store_path, read_only=True) as store:
        a = load_campaign_data(store, first)
        b = load_campaign_data(store, second)
    return compare_campaigns(a.params, b.params, names=(a.name, b.name))


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
    rows = sorted(cast("list[dict[str, Any]]", params.to_dict("records")), key=test_sort_key)
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
            item.update(note=notes.get(test_id, ""), t=t, u=u, y=y,
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
                          checked_by: str | None = None) -> ReportOutcome:
    """The self-contained HTML report of a campaign (and PNG charts when ``png_dir``; the
    schedule CSV too when ``schedule_out``); ``prepared_by`` and ``checked_by`` fill the
    record block."""
    from mapper.presentation.report import write_report
    data, verdict = verdict_for(store_path, campaign=campaign, ms_max=ms_max, slowdown_max=slowdown_max,
                                schedule_out=schedule_out)
    opmap = build_map(data.params)
    found = comparisons(store_path, campaign=data.name)
    if compare_with:
        found += compare_two(store_path, compare_with, data.name)
    summary = {"name": data.name, "n_tests": int(len(data.params)), "units": data.units}
    for quality in ("good", "suspect", "rejected"):
        summary[f"{quality} tests"] = int((data.params["quality"] == quality).sum())
    if data.note:
        summary["note"] = data.note
    with Store(store_path, read_only=True) as store:
        described = store.campaign_info(data.name)
        if described and described[0].get("description"):
            summary["description"] = str(described[0]["description"])
        # tests stream from the store into the file one at a time
        info = write_report(out, campaign=summary, params=data.params, trend=opmap.trend_frame(),
                            map_summary=opmap.summary(), verdict=verdict.report_dict(),
                            comparisons=found, tests=_iter_tests(store, data.params),
                            png_dir=png_dir, prepared_by=prepared_by, checked_by=checked_by)
    return ReportOutcome(Path(info.path), info.size_bytes, tuple(info.png_files), verdict)


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


def run_demo(out_dir: Path, *, png: bool = False) -> DemoOutcome:
    """The whole job on the sample campaign, into a fresh store inside ``out_dir``.

    Never touches any other store: the demo store lives in ``out_dir`` and is replaced on
    each run.
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
    with Store(db) as store:
        summary = import_sources(store, folders)
        lines += summary.lines()
        fitted = fit_store(store)
        lines += fitted.lines()
        names = [c["name"] for c in store.campaign_info()]
    newest = names[-1]
    data, opmap = operating_map(db, campaign=newest, influence=False)
    lines += ["", f"Operating map of '{newest}':"]
    lines += format_records(opmap.summary(), "table", kind="map").splitlines()
    png_dir = out_dir / "charts" if png else None
    if png_dir is not None and png_dir.exists():
        shutil.rmtree(png_dir)
    report = write_campaign_report(db, out_dir / "report.html", campaign=newest, png_dir=png_dir,
                                   compare_with=names[0] if len(names) > 1 else None,
                                   schedule_out=out_dir / "schedule.csv")
    assert report.verdict is not None  # write_campaign_report always decides
    result = report.verdict.to_dict()
    lines += ["", f"Verdict: {result['decision']}"] + [f"  - {r}" for r in result["reasons"]]
    if report.verdict.depends_on_sentence:
        lines += [f"  - {report.verdict.depends_on_sentence}"]
    if len(names) > 1:
        moved = compare_two(db, names[0], newest)
        lines += ["", f"'{names[0]}' against '{newest}':"] + [f"  - {m['sentence']}" for m in moved[:6]]
    seconds = time.perf_counter() - started
    lines += ["", f"store:    {db}", f"report:   {report.path} ({report.size_bytes / 1e6:.1f} MB)",
              f"schedule: {out_dir / 'schedule.csv'}"]
    if report.png_files:
        lines.append(f"charts:   {len(report.png_files)} PNG files in {png_dir}")
    lines += [f"done in {seconds:.1f} s", "", SAFETY_NOTE]
    return DemoOutcome(out_dir, db, report.path, out_dir / "schedule.csv", report.png_files, seconds, lines)
