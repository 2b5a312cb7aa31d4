"""`mapper bench` runs end to end at a tiny size and its JSON carries every figure (no timing asserts)."""

from __future__ import annotations

import json
import tempfile

import pytest
from conftest import run_mapper


def e2e_ratio(figures: dict) -> float:
    runs = figures["end_to_end"]
    return runs["large"]["import_fit_peak_rss_mb"] / runs["small"]["import_fit_peak_rss_mb"]


@pytest.mark.slow  # runs the whole benchmark: a dozen processes
def test_bench_tiny_run_reports_every_field(tmp_path, monkeypatch):
    scratch = tmp_path / "scratch"  # where the bench's temporary folder goes (and must leave)
    scratch.mkdir()
    monkeypatch.setattr(tempfile, "tempdir", str(scratch))
    out = tmp_path / "bench.json"
    result = run_mapper("bench", "--tests", "4", "--samples", "240", "--scale", "2", "--json", out,
                        cwd=tmp_path, timeout=600)
    assert result.returncode == 0, result.stderr
    figures = json.loads(out.read_text())
    assert set(figures) >= {"machine", "tests", "samples", "import", "fit", "end_to_end", "targets_met"}
    assert set(figures["import"]) >= {"mapper_rows_per_second", "bare_scan_rows_per_second", "throughput_ratio"}
    assert set(figures["fit"]) >= {"one_core_per_test_ms", "all_cores_per_test_ms", "curve_fit_loop_per_test_ms",
                                   "mapper_within_tolerance", "curve_fit_within_tolerance",
                                   "import_plus_fit_seconds", "curve_fit_loop_seconds",
                                   "large_one_core_per_test_ms", "large_all_cores_per_test_ms",
                                   "large_import_plus_fit_seconds", "large_curve_fit_loop_seconds",
                                   "large_curve_fit_loop_per_test_ms"}
    for size in ("small", "large"):
        run = figures["end_to_end"][size]
        assert run["peak_rss_mb"] > 0 and run["import_seconds"] > 0 and run["analyse_seconds"] > 0
    assert figures["end_to_end"]["large"]["tests"] == 8
    assert set(figures["targets_met"]) == {"import_throughput", "fit_one_core_speed", "fit_accuracy",
                                           "fit_all_cores_faster", "import_plus_fit_faster_than_loop",
                                           "memory_growth", "time_growth", "import_fit_memory_growth"}
    assert 0 < e2e_ratio(figures) == figures["end_to_end"]["import_fit_memory_ratio"]
    e2e = figures["end_to_end"]
    assert e2e["growth_ratio"] == pytest.approx(
        (e2e["large"]["import_seconds"] + e2e["large"]["fit_seconds"])
        / (e2e["small"]["import_seconds"] + e2e["small"]["fit_seconds"]))
    assert "import + fit time ratio at 2x the tests" in result.stdout
    assert all(isinstance(v, bool) for v in figures["targets_met"].values())
    # every synthetic test is clean, so both fitters should recover nearly all of them
    assert figures["fit"]["mapper_within_tolerance"] >= 0.75
    assert "peak memory ratio" in result.stdout and "peak memory ratio of import + fit alone" in result.stdout
    assert not list(scratch.iterdir())  # its temporary folder is removed
    # rows are labelled with the scale actually run, never a fixed "10x"
    assert figures["scale"] == 2 and "at 2x the tests" in result.stdout and "10x" not in result.stdout
    # start-up rows: both commands measured against the bare imports, none loading charting or signal code
    # end-to-end rows as a user runs the commands, at both sizes, next to the notebook loop
    assert [row["tests"] for row in figures["processes"]] == [4, 8]
    for row in figures["processes"]:
        assert min(row["import_seconds"], row["fit_seconds"], row["loop_seconds"]) > 0
        assert row["ratio"] == pytest.approx(row["loop_seconds"] / (row["import_seconds"] + row["fit_seconds"]))
    rows = {row["command"]: row for row in figures["start_up"]}
    assert set(rows) == {"mapper --help", "mapper params"}
    for row in rows.values():
        assert row["seconds"] > 0 and row["ratio"] > 0
        assert row["heavy_imports"] == []
