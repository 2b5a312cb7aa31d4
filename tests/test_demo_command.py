"""`mapper demo` end to end (once per session, see conftest.demo_run), then the analysis commands on its store."""

from __future__ import annotations

import csv
import json
import re
from pathlib import Path

import duckdb
import pytest

from conftest import run_mapper

SAMPLE = Path(__file__).resolve().parents[1] / "sample_campaign"
NEW = "Hot-water exchanger E-3, after overhaul, 2026"
OLD = "Hot-water exchanger E-3, before overhaul, 2024"


@pytest.fixture(scope="module")
def demo(demo_run) -> Path:
    """The demo's output folder (the demo itself runs once per session: conftest.demo_run)."""
    return demo_run["out"]


def test_demo_leaves_the_users_stores_alone(demo_run):
    for store, before in demo_run["stores_before"].items():
        assert store.read_bytes() == before, store
    assert not (demo_run["work"] / "mapper.duckdb.wal").exists()


def test_demo_stores_every_sample_test(demo):
    expected = sum(1 for p in SAMPLE.glob("*/*.csv"))
    with duckdb.connect(str(demo / "demo.duckdb"), read_only=True) as con:
        stored = con.execute("SELECT count(*), count(quality) FROM test_params").fetchone()
    assert stored == (expected, expected)


def test_demo_flags_the_imperfect_tests(demo):
    with duckdb.connect(str(demo / "demo.duckdb"), read_only=True) as con:
        rows = dict(con.execute("SELECT file, flags FROM test_params").fetchall())
        quality = dict(con.execute("SELECT file, quality FROM test_params").fetchall())
    # the three deliberately imperfect tests of the scenario (docs/sample_campaign.md)
    assert "output_clipped" in rows["t080_up_2.csv"]
    assert "not_settled" in rows["t072_down_2.csv"]
    assert quality["t056_up_2.csv"] != "good"  # disturbed mid-test
    clean = [f for f in rows if f not in ("t080_up_2.csv", "t072_down_2.csv", "t056_up_2.csv")]
    assert all(quality[f] == "good" for f in clean), {f: rows[f] for f in clean if quality[f] != "good"}


def test_demo_writes_verdict_report_and_schedule(demo, demo_run):
    assert "Verdict: schedule" in demo_run["result"].stdout
    report = (demo / "report.html").read_text()
    # every chart is a Vega-Lite specification in its own JSON element, one per chart element
    specs = [json.loads(text) for text in re.findall(
        r'<script type="application/json" id="spec-\d+">(.*?)</script>', report, flags=re.S)]
    assert len(specs) >= 4
    assert len(specs) == report.count('class="chart"')
    assert all("vega-lite" in spec["$schema"] for spec in specs)
    # one step-response chart per test of the newest campaign, and the libraries inline (opens offline)
    tests = len(list((SAMPLE / "exchanger_2026").glob("*.csv")))
    assert report.count('aria-label="Step response of ') == tests
    assert "window.vegaEmbed" in report or "vegaEmbed=" in report
    assert NEW in report
    # tests titled by their data files, and the campaign described
    assert "<h3>t080_up_2.csv " in report
    assert "the steam valve stepped open-loop, in manual" in report
    with (demo / "schedule.csv").open() as handle:
        lines = handle.read().splitlines()
    assert any("CAUTION" in line for line in lines if line.startswith("#"))
    rows = list(csv.DictReader(line for line in lines if not line.startswith("#")))
    assert len(rows) >= 2 and all(float(r["kc"]) > 0 and float(r["ti"]) > 0 for r in rows)
    assert (demo / "charts" / "operating_map.png").stat().st_size > 10_000
    # the charts of the tests are named after their data files
    assert (demo / "charts" / "t080_up_2.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_report_command_fills_the_record_block(demo, tmp_path):
    out = tmp_path / "signed.html"
    result = run_mapper("report", "--campaign", NEW, "--out", out, "--prepared-by", "R. Field",
                        "--checked-by", "S. Lead", db=demo / "demo.duckdb")
    assert result.returncode == 0, result.stderr
    page = out.read_text(encoding="utf-8")
    record = re.search(r'<section id="record">(.*?)</section>', page, flags=re.S).group(1)
    assert "<td>R. Field</td>" in record and "<td>S. Lead</td>" in record
    outside_scripts = re.sub(r"<(script|style)\b[^>]*>.*?</\1>", " ", page, flags=re.S)
    assert "kc_dimensionless" not in outside_scripts and "serves_whole_range" not in outside_scripts
    assert not re.search(r">\s*(True|False|None)\s*<", outside_scripts)


def test_at_inside_and_outside_the_range(demo):
    db = demo / "demo.duckdb"
    inside = run_mapper("at", "60", "--campaign", NEW, "--format", "json", db=db)
    assert inside.returncode == 0, inside.stderr
    answer = json.loads(inside.stdout)
    assert set(answer) >= {"level", "gain", "gain_lo", "gain_hi", "time_constant", "time_constant_lo",
                           "time_constant_hi", "dead_time", "dead_time_lo", "dead_time_hi"}
    assert answer["gain_lo"] < answer["gain"] < answer["gain_hi"]
    outside = run_mapper("at", "95", "--campaign", NEW, db=db)
    assert outside.returncode == 1 and "40" in outside.stderr and "80" in outside.stderr
    assert "Traceback" not in outside.stderr


def test_verdict_json_shape(demo):
    result = run_mapper("verdict", "--campaign", NEW, "--format", "json", db=demo / "demo.duckdb")
    assert result.returncode == 0, result.stderr
    verdict = json.loads(result.stdout)
    assert verdict["decision"] in ("single", "schedule")
    assert verdict["reasons"] and all(isinstance(r, str) for r in verdict["reasons"])
    assert set(verdict["variation"]["gain"]) >= {"min", "max", "ratio", "significant"}
    assert {"level", "ms", "gain_margin", "phase_margin_deg", "slowdown", "iae_ratio", "peak_ratio",
            "overshoot"} <= set(verdict["points"][0])
    assert {"level", "kc", "ti"} <= set(verdict["schedule"][0])
    assert len(verdict["reason_codes"]) == len(verdict["reasons"])
    assert verdict["decision"] != "schedule" or "no_single_controller" in verdict["reason_codes"]


def test_verdict_prints_iae_ratio_peak_and_ms_per_level(demo):
    result = run_mapper("verdict", "--campaign", NEW, db=demo / "demo.duckdb")
    assert result.returncode == 0, result.stderr
    header = next(line for line in result.stdout.splitlines() if "iae_ratio" in line)
    assert "peak_ratio" in header and "ms" in header.split()


def test_map_and_compare_commands(demo):
    db = demo / "demo.duckdb"
    mapped = run_mapper("map", "--campaign", NEW, "--format", "json", db=db)
    assert mapped.returncode == 0, mapped.stderr
    names = {row["parameter"] for row in json.loads(mapped.stdout)}
    assert names == {"gain", "time_constant", "dead_time", "gain_over_time_constant"}
    compared = run_mapper("compare", OLD, NEW, db=db)
    assert compared.returncode == 0, compared.stderr
    assert "Gain" in compared.stdout
    missing = run_mapper("compare", OLD, "no such campaign", db=db)
    assert missing.returncode == 1 and "campaigns stored" in missing.stderr


def test_map_against_input_and_extrapolation_warning(demo):
    db = demo / "demo.duckdb"
    mapped = run_mapper("map", "--campaign", NEW, "--against", "input", "--format", "json", db=db)
    assert mapped.returncode == 0, mapped.stderr
    gain = next(r for r in json.loads(mapped.stdout) if r["parameter"] == "gain")
    # on the steam-valve side the gain falls as the valve opens (more flow, less gain per %)
    assert gain["at_low_end"] > gain["at_high_end"]
    far = run_mapper("at", "85", "--campaign", NEW, "--extrapolate", "--format", "json", db=db)
    assert far.returncode == 0 and "warning" in far.stderr
    assert json.loads(far.stdout)["level"] == 85
