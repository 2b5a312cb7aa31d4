"""HTML report: content, escaping, PNG output, and rendering in a headless browser offline."""

from __future__ import annotations

import html
import json
import re
import shutil
import subprocess
import weakref
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from mapper.errors import MapperError
from mapper.presentation import charts, report
from mapper.presentation.report import cards
from mapper.presentation.report import page as report_page

EVIL = "<script>alert(1)</script>"
BREAKOUT = "</script><script>alert(2)</script>"
PERIOD = 0.5
STEP_TIME = 20.0
DESCRIPTION = "Level loop LC-7 on the feed tank; steps on the inlet valve, night shift."
QUIET_REPEAT = "At level 50 (up steps), 2 repeats give gain 1.9 to 2.1: spread consistent."
LOUD_DIRECTION = f"At level 80 the gain differs between up and down steps {EVIL}."
COMPARISONS = [
    {"level": 50.0, "direction": "up", "parameter": "gain", "n_tests": 2, "test_ids": [1, 2],
     "min": 1.9, "max": 2.1, "consistent": True, "p_value": 0.45, "sentence": QUIET_REPEAT},
    {"level": 80.0, "parameter": "gain", "up": 2.6, "down": 2.2, "difference": 0.4, "z": 3.1,
     "differs": True, "sentence": LOUD_DIRECTION},
    {"level": 80.0, "parameter": "dead_time", "up": 3.0, "down": 3.1, "difference": -0.1, "z": 0.4,
     "differs": False, "sentence": "At level 80 up and down steps agree on dead time."},
    {"parameter": "time_constant", "campaign_a": "spring 2024", "campaign_b": "spring 2026",
     "moved": False, "levels": [], "level": 60.0, "value_a": 15.0, "value_b": 16.0, "change": 0.067,
     "z": 0.8, "sentence": "Time constant did not move significantly between the campaigns."},
]


def fopdt_test(test_id, level, direction, gain, time_constant, dead_time, *, quality="good",
               flags=(), note="", seed=0):
    """Synthetic test: exact FOPDT step response plus white noise (textbook response)."""
    step = 5.0 if direction == "up" else -5.0
    t = np.arange(600) * PERIOD
    u = np.where(t >= STEP_TIME, 40.0 + step, 40.0)
    elapsed = np.clip(t - STEP_TIME - dead_time, 0.0, None)
    ideal = level + gain * step * (1.0 - np.exp(-elapsed / time_constant))
    y = ideal + np.random.default_rng(seed).normal(0.0, 0.05, len(t))
    row = dict(test_id=test_id, campaign="spring", file=f"{test_id}.csv", level=level,
               direction=direction, input_step=step, model="fopdt", gain=gain,
               gain_lo=gain * 0.95, gain_hi=gain * 1.05, time_constant=time_constant,
               time_constant_lo=time_constant * 0.9, time_constant_hi=time_constant * 1.1,
               dead_time=dead_time, dead_time_lo=dead_time - 0.2, dead_time_hi=dead_time + 0.2,
               nrmse=0.01, quality=quality, flags=list(flags))
    return {**row, "note": note, "t": t, "u": u, "y": y, "fitted": ideal, "step_time": STEP_TIME}


@pytest.fixture(scope="module")
def inputs():
    tests = [
        fopdt_test("G20up", 20.0, "up", 1.4, 12.0, 3.0, seed=1),
        fopdt_test("G50down", 50.0, "down", 2.0, 15.0, 3.0, seed=2),
        fopdt_test(EVIL, 80.0, "up", 2.6, 18.0, 3.0, quality="suspect", flags=["disturbed"],
                   note=BREAKOUT, seed=3),
        fopdt_test("R80down", 80.0, "down", 2.6, 18.0, 3.0, quality="rejected",
                   flags=["not_settled"], seed=4),
    ]
    params = pd.DataFrame([{k: v for k, v in t.items() if k not in ("note", "t", "u", "y",
                                                                    "fitted", "step_time")}
                           for t in tests])
    params["excluded"] = params["test_id"] == "R80down"
    params["exclusion_reason"] = np.where(params["excluded"], "Valve sticking, see shift log", None)
    params["note"] = ""
    levels = np.linspace(20, 80, 7)
    trend = pd.DataFrame({"parameter": "gain", "level": levels, "value": 1 + levels / 50,
                          "lo": 0.9 * (1 + levels / 50), "hi": 1.1 * (1 + levels / 50)})
    verdict = {
        "decision": "schedule",
        "reasons": ["Ms of the single controller reaches 2.4 at level 80, above the limit 2.0."],
        "variation": {"gain": {"min": 1.4, "max": 2.6, "ratio": 1.86, "significant": True}},
        "controller": {"kc": 1.2, "ti": 15.0, "ti_min": 0.25, "action": "reverse",
                       "closed_loop_time": None, "kc_dimensionless": 1.5,
                       "proportional_band": 66.7, "serves_whole_range": False, "local_rule": "simc"},
        "points": [{"level": 20.0, "ms": 1.5, "gain_margin": 3.1, "phase_margin_deg": 62.0,
                    "slowdown": 1.0},
                   {"level": 80.0, "ms": 2.4, "gain_margin": 1.8, "phase_margin_deg": 38.0,
                    "slowdown": 1.6}],
        "schedule": [{"level": 20.0, "level_from": 20.0, "level_to": 50.0, "kc": 1.7, "ti": 12.0,
                      "ti_min": 0.2},
                     {"level": 80.0, "level_from": 50.0, "level_to": 80.0, "kc": 1.0, "ti": 18.0,
                      "ti_min": 0.3}],
        "schedule_points": [{"level": 20.0, "ms": 1.59}, {"level": 80.0, "ms": 1.59}],
        "ms_max": 2.0,
    }
    return dict(
        campaign={"name": f"Feed tank {EVIL}", "n_tests": len(tests), "description": DESCRIPTION,
                  "units": {"input": "%", "output": "cm"}, "notes": ["night shift", EVIL]},
        params=params, trend=trend,
        map_summary=[{"parameter": "gain", "shape": "linear", "min": 1.4, "max": 2.6,
                      "ratio": 1.86, "significant": True, "reason": "outside the 95 % band"}],
        verdict=verdict,
        comparisons=COMPARISONS,
        tests=tests)


@pytest.fixture(scope="module")
def written(inputs, tmp_path_factory):
    path = tmp_path_factory.mktemp("report") / "report.html"
    info = report.write_report(path, prepared_by="A. Engineer", checked_by=None, **inputs)
    return info, path.read_text(encoding="utf-8")


def visible_text(page: str) -> str:
    """The words a reader sees: the page without scripts, styles and tags, entities decoded."""
    body = re.sub(r"<(script|style)\b[^>]*>.*?</\1>", " ", page, flags=re.S | re.I)
    return html.unescape(re.sub(r"<[^>]+>", " ", body))


# ------------------------------------------------------------- content
def test_report_info_and_sections(written):
    info, text = written
    assert info.size_bytes == info.path.stat().st_size > 0
    assert info.png_files == ()
    # map, schedule, margins, overlay and four tests
    assert info.n_charts == 8
    order = [text.index(f'<section id="{s}">') for s in
             ("record", "summary", "verdict", "excluded", "map", "comparisons", "schedule", "tests",
              "methods", "cautions")]
    assert order == sorted(order)
    assert "A gain schedule is needed" in text
    assert "Ms of the single controller reaches 2.4" in text


def test_report_lists_rejected_then_suspect_then_good(written):
    _, text = written
    # tests are titled by their data file
    positions = [text.index(f"<h3>{name}.csv ") for name in
                 ("R80down", html.escape(EVIL), "G20up", "G50down")]
    assert positions == sorted(positions)


def section(text: str, name: str) -> str:
    return re.search(rf'<section id="{name}">(.*?)</section>', text, flags=re.S).group(1)


def test_report_is_a_record_with_names_dates_and_blanks(written):
    _, text = written
    record = visible_text(section(text, "record"))
    date = re.search(r"Written (\d{4}-\d{2}-\d{2})", text).group(1)
    assert re.search(rf"Prepared by\s+A\. Engineer\s+{date}", record)
    assert re.search(r"Checked by\s+Blank fields", record)  # nothing filled in: room to sign


def test_report_shows_the_campaign_description(written):
    _, text = written
    assert DESCRIPTION in visible_text(section(text, "summary"))


def test_report_lists_excluded_tests_with_reasons(written):
    _, text = written
    excluded = visible_text(section(text, "excluded"))
    assert "R80down.csv" in excluded and "Valve sticking, see shift log" in excluded
    assert "G20up" not in excluded
    assert 'class="badge excluded"' in text
    # the excluded test is counted apart and not among the tests used
    summary = visible_text(section(text, "summary"))
    assert re.search(r"Tests excluded by the engineer\s+1\b", summary)
    assert re.search(r"Quality of the tests used\s+2 good, 1 suspect, 0 rejected", summary)


def test_comparisons_are_tables_with_sentences_for_notable_rows_only(written):
    _, text = written
    part = section(text, "comparisons")
    assert part.count("<table>") == 3  # repeats, directions, campaigns
    shown = visible_text(part)
    assert "At level 80 the gain differs between up and down steps" in shown
    assert QUIET_REPEAT not in shown
    assert "agree on dead time" not in shown
    assert "did not move significantly" not in shown
    assert "beyond the 95 % uncertainty (3.1 standard errors)" in shown
    assert "+7 %" in shown  # the change between campaigns, as a percentage


def test_report_shows_no_field_names_or_python_values(written):
    _, text = written
    shown = visible_text(text)
    for raw in ("kc_dimensionless", "serves_whole_range", "closed_loop_time", "time_constant",
                "dead_time", "level_from", "ti_min", "phase_margin_deg", "fopdt", "None", "nan"):
        assert not re.search(rf"\b{raw}\b", shown), raw
    assert not re.search(r"\b(True|False)\b", shown)
    # the same settings, in words
    assert "Controller gain in % of span per % of span" in shown
    assert re.search(r"Serves the whole tested range\s+no", shown)


def test_report_names_methods_sources_and_cautions(written):
    _, text = written
    for source in ("63.2 %", "Smith, C. L. (1972)", "Sundaresan, K. R. and Krishnaswamy, P. R. (1978)",
                   "Åström, K. J. and Hägglund, T. (1995)", "zero-order",
                   "Skogestad, S. (2003)", "exact frequency response"):
        assert source in text
    for caution in ("Agree every step size", "alarm and trip limits", "before relying on it",
                    "Site procedures"):
        assert caution in text
    # tuning is handed over in the verdict and the schedule sections: cautions beside both
    assert text.count('class="caution"') >= 3


def test_report_escapes_user_text(written):
    _, text = written
    assert "alert(1)" in text and "alert(2)" in text
    assert EVIL not in text and BREAKOUT not in text
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in text
    assert "&lt;/script&gt;&lt;script&gt;alert(2)&lt;/script&gt;" in text
    # every script element is ours: the two inline ones, the bundle, the renderer, the specs
    opening = re.findall(r"<script[^>]*>", text)
    assert set(opening) <= {"<script>"} | {f'<script type="application/json" id="spec-{i}">'
                                            for i in range(8)}


def test_report_embedded_specs_parse_and_keep_the_text(written):
    _, text = written
    blocks = re.findall(r'<script type="application/json" id="spec-(\d+)">(.*?)</script>', text,
                        flags=re.S)
    assert [int(i) for i, _ in blocks] == list(range(8))
    specs = [json.loads(body) for _, body in blocks]
    titles = [s["title"]["text"] for s in specs if isinstance(s.get("title"), dict)]
    assert any(t.startswith(EVIL) for t in titles)  # restored exactly by JSON.parse
    assert all("<" not in body for _, body in blocks)


def test_report_needs_no_network(written):
    _, text = written
    markup = re.sub(r"<script[^>]*>.*?</script>", "", text, flags=re.S)  # the page outside scripts
    assert not re.search(r"<(script|link|img|iframe)[^>]+(src|href)=", markup)
    assert not re.search(r"<script[^>]+src=", text)
    assert "vegaEmbed" in text and "window.vega=" in text  # the libraries are inline


def test_safe_json_round_trip():
    value = {"a": "</script><!-- & \u2028", "b": [1.5, None, True]}
    text = report.safe_json(value)
    assert "<" not in text and ">" not in text and "&" not in text and "\u2028" not in text
    assert json.loads(text) == value


def test_report_without_verdict_or_tests(tmp_path):
    info = report.write_report(tmp_path / "empty.html", campaign={"name": "empty"}, params=None)
    text = info.path.read_text(encoding="utf-8")
    assert info.n_charts == 0
    assert "No verdict was given" in text and "Every test (0)" in text


def test_report_unwritable_path_raises_mapper_error(tmp_path, inputs):
    with pytest.raises(MapperError, match="cannot write the report"):
        report.write_report(tmp_path / "missing" / "r.html", **inputs)


def test_png_dir_writes_every_chart(inputs, tmp_path):
    info = report.write_report(tmp_path / "r.html", png_dir=tmp_path / "png", **inputs)
    assert len(info.png_files) == info.n_charts == 8
    for png in info.png_files:
        assert png.parent == tmp_path / "png"
        assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification)
        assert "<" not in png.name and "/" not in png.stem
    # the charts of the tests are named after their data files
    assert {"operating_map.png", "overlay.png", "schedule.png", "margins.png", "G20up.png",
            "G50down.png", "R80down.png"} <= {p.name for p in info.png_files}


def test_png_export_includes_the_closed_loop_chart(inputs, tmp_path):
    from mapper.analysis.responses import response_rows

    verdict = dict(inputs["verdict"])
    verdict["points"] = [dict(p, gain=1.5, time_constant=12.0, dead_time=3.0, kc_local=1.3, ti_local=12.0,
                              iae_ratio=1.1) for p in verdict["points"]]
    verdict["responses"] = response_rows(verdict)
    info = report.write_report(tmp_path / "r.html", png_dir=tmp_path / "png", **dict(inputs, verdict=verdict))
    assert info.n_charts == 9
    chart = tmp_path / "png" / "closed_loop.png"
    assert chart.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification)
    assert "Simulated closed-loop responses" in (tmp_path / "r.html").read_text(encoding="utf-8")


# ------------------------------------------------------------- streaming
def test_streamed_tests_are_held_one_at_a_time(inputs, tmp_path):
    live = []
    most = 0

    def stream():
        nonlocal most
        for index in range(12):
            test = fopdt_test(f"S{index:02d}", 20.0 + index, "up", 1.5, 12.0, 3.0, seed=index)
            live.append(weakref.ref(test["y"]))
            most = max(most, sum(ref() is not None for ref in live))
            yield test

    info = report.write_report(tmp_path / "s.html", **{**inputs, "tests": stream()})
    # the previous item may still be bound while the next is made; never more than that
    assert most <= 2
    text = info.path.read_text(encoding="utf-8")
    assert "Every test (12)" in text and info.n_charts == 4 + 12
    # a stream is shown in the order given (the caller sorts it), the overlay above the cards
    positions = [text.index(f"<h3>S{index:02d}.csv ") for index in range(12)]
    assert positions == sorted(positions)
    assert text.index('aria-label="All tests normalised on one plot"') < positions[0]
    blocks = re.findall(r'<script type="application/json" id="spec-(\d+)">(.*?)</script>', text,
                        flags=re.S)
    assert [int(i) for i, _ in blocks] == list(range(16))
    overlay = json.loads(blocks[3][1])
    rows = [r for values in overlay["datasets"].values() for r in values if "response" in r]
    assert {r["test_id"] for r in rows} == {f"S{index:02d}" for index in range(12)}


def test_overlay_rows_stream_in_chunks_as_valid_json(inputs, tmp_path, monkeypatch):
    tests = [fopdt_test(f"C{index}", 30.0, "up", 1.5, 12.0, 3.0, seed=index) for index in range(5)]
    original = cards.overlay
    monkeypatch.setattr(cards, "overlay", lambda page, series, spec_id: original(
        page, series, spec_id, chunk=7))  # many small chunks, one partly filled
    info = report.write_report(tmp_path / "c.html", **{**inputs, "tests": tests})
    text = info.path.read_text(encoding="utf-8")
    body = re.search(r'<script type="application/json" id="spec-3">(.*?)</script>', text, flags=re.S)
    spec = json.loads(body.group(1))
    rows = [r for values in spec["datasets"].values() for r in values if "response" in r]
    expected = sum(len(charts.overlay_series(t).elapsed) for t in tests)
    assert len(rows) == expected
    assert cards.ROWS_PLACEHOLDER not in rows


def test_error_while_streaming_leaves_no_half_report(inputs, tmp_path):
    target = tmp_path / "r.html"
    target.write_text("the previous report", encoding="utf-8")

    def failing():
        yield fopdt_test("F1", 20.0, "up", 1.5, 12.0, 3.0)
        raise ValueError("store went away")

    with pytest.raises(ValueError, match="store went away"):
        report.write_report(target, **{**inputs, "tests": failing()})
    assert target.read_text(encoding="utf-8") == "the previous report"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["r.html"]


def test_test_sort_key_orders_quality_then_level():
    rows = [{"test_id": "a", "quality": "good", "level": 10.0},
            {"test_id": "b", "quality": "rejected", "level": 90.0},
            {"test_id": "c", "quality": "suspect", "level": None},
            {"test_id": "d", "quality": "suspect", "level": 50.0},
            {"test_id": "e", "quality": None, "level": 1.0}]
    assert [r["test_id"] for r in sorted(rows, key=report.test_sort_key)] == ["b", "d", "c", "a", "e"]


# ------------------------------------------------------------- browser
def find_browser() -> str:
    for name in ("/usr/bin/chromium", "chromium", "chromium-browser", "google-chrome"):
        found = shutil.which(name)
        if found:
            return found
    pytest.fail("no Chromium found: install it (apt-get install chromium) to run the report test")


def render_offline(page: Path, profile: Path) -> tuple[str, str]:
    """Open ``page`` in headless Chromium with the network blocked; return (DOM, log)."""
    command = [
        find_browser(), "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
        "--no-first-run", "--disable-background-networking", "--disable-component-update",
        "--disable-sync", f"--user-data-dir={profile}",
        "--host-resolver-rules=MAP * ~NOTFOUND", "--proxy-server=127.0.0.1:9",
        "--enable-logging=stderr", "--v=0", "--virtual-time-budget=20000",
        "--dump-dom", page.resolve().as_uri(),
    ]
    done = subprocess.run(command, capture_output=True, text=True, timeout=180, check=False)
    assert done.returncode == 0, done.stderr[-2000:]
    return done.stdout, done.stderr


def test_report_renders_offline_in_a_browser(written, tmp_path):
    info, _ = written
    dom, log = render_offline(info.path, tmp_path / "profile")
    body = re.search(r"<body[^>]*>", dom).group(0)
    assert f'data-charts-rendered="{info.n_charts}"' in body
    assert 'data-charts-failed="0"' in body and 'data-charts-complete="yes"' in body
    assert "data-script-errors" not in re.search(r"<html[^>]*>", dom).group(0)
    # our page logs nothing when all is well; any console line is an error or a warning
    console = [line for line in log.splitlines() if "CONSOLE" in line]
    assert console == []
    assert len(re.findall(r"<svg\b", dom)) >= info.n_charts
    # the hostile note and name are text on the page, never elements
    assert "&lt;/script&gt;&lt;script&gt;alert(2)&lt;/script&gt;" in dom
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in dom
    assert "<script>alert(" not in dom
    # the record's own sections are drawn, and nothing a reader sees is a field name or a Python value
    shown = visible_text(dom)
    for heading in ("Record", "Excluded tests", "Comparisons", "Up against down steps"):
        assert re.search(rf"<h[23][^>]*>{heading}</h[23]>", dom), heading
    assert "A. Engineer" in shown and "Valve sticking, see shift log" in shown and DESCRIPTION in shown
    assert "kc_dimensionless" not in shown and "serves_whole_range" not in shown
    assert not re.search(r"\b(True|False|None)\b", shown)
    # chart text (titles, axes, legends) is part of what is seen: it speaks plainly too
    svg_text = " ".join(re.findall(r"<text[^>]*>([^<]*)</text>", dom))
    assert "G20up.csv: level 20 cm, up step" in svg_text
    assert not re.search(r"\b(test_id|time_constant|dead_time|not_settled)\b", svg_text)


def test_browser_helper_sees_script_errors(tmp_path):
    # the check above could pass vacuously if errors went unseen: make one on purpose
    page = tmp_path / "broken.html"
    page.write_text("<html><head><script>" + report_page.asset("error_hook.js") + "</script></head><body>"
                    "<script>notDefinedAnywhere();</script></body></html>", encoding="utf-8")
    dom, log = render_offline(page, tmp_path / "profile")
    assert 'data-script-errors="1"' in dom
    assert any("CONSOLE" in line and "notDefinedAnywhere" in line for line in log.splitlines())
