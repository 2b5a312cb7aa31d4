"""Chart builders: inspect the Vega-Lite specs (marks, encodings, data rows)."""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest

from mapper.presentation import charts

UNITS = {"input": "%", "output": "cm"}
STEP_TIME = 20.0
PERIOD = 0.5


def fopdt(gain, time_constant, dead_time, input_step, *, n=800, noise=0.0, seed=0):
    """Analytic FOPDT step response y = K du (1 - exp(-(t - t0 - theta)/tau)) (textbook)."""
    t = np.arange(n) * PERIOD
    u = np.where(t >= STEP_TIME, 40.0 + input_step, 40.0)
    elapsed = np.clip(t - STEP_TIME - dead_time, 0.0, None)
    ideal = 100.0 + gain * input_step * (1.0 - np.exp(-elapsed / time_constant))
    rng = np.random.default_rng(seed)
    return t, u, ideal + rng.normal(0.0, noise, n), ideal


def params_row(test_id, level, direction, gain, time_constant, dead_time, input_step,
               quality="good", flags=()):
    return dict(test_id=test_id, campaign="spring", file=f"{test_id}.csv", level=level,
                direction=direction, input_step=input_step, model="fopdt",
                gain=gain, gain_lo=gain * 0.95, gain_hi=gain * 1.05,
                time_constant=time_constant, time_constant_lo=time_constant * 0.9,
                time_constant_hi=time_constant * 1.1, dead_time=dead_time,
                dead_time_lo=dead_time - 0.2, dead_time_hi=dead_time + 0.2, nrmse=0.01,
                quality=quality, flags=list(flags))


@pytest.fixture
def campaign():
    """Eight tests at four levels, up and down, gain and lag growing with level; one rejected."""
    rows, tests = [], []
    for i, level in enumerate([20.0, 40.0, 60.0, 80.0]):
        for direction in ("up", "down"):
            gain, tau, theta = 1 + level / 50, 10 + level / 10, 3.0
            step = 5.0 if direction == "up" else -5.0
            t, u, y, fit = fopdt(gain, tau, theta, step, noise=0.05, seed=i)
            quality = "rejected" if (level == 80.0 and direction == "down") else "good"
            row = params_row(f"L{int(level)}{direction}", level, direction, gain, tau, theta, step,
                             quality=quality, flags=["not_settled"] if quality == "rejected" else ())
            rows.append(row)
            tests.append({**row, "note": "", "t": t, "u": u, "y": y, "fitted": fit,
                          "step_time": STEP_TIME})
    return pd.DataFrame(rows), tests


def trend_frame():
    levels = np.linspace(20, 80, 13)
    funcs = {"gain": lambda x: 1 + x / 50, "time_constant": lambda x: 10 + x / 10,
             "dead_time": lambda x: 3 + 0 * x,
             "gain_over_time_constant": lambda x: (1 + x / 50) / (10 + x / 10)}
    return pd.concat([pd.DataFrame({"parameter": p, "level": levels, "value": f(levels),
                                    "lo": 0.9 * f(levels), "hi": 1.1 * f(levels)})
                      for p, f in funcs.items()], ignore_index=True)


def spec_of(chart):
    spec = chart.to_dict()  # validates against the Vega-Lite schema
    json.dumps(spec, allow_nan=False)  # the browser's JSON.parse rejects NaN
    return spec


def dataset_rows(spec, data):
    """Rows of a view's data, resolving altair's named top-level datasets."""
    if "values" in data:
        return data["values"]
    return spec["datasets"][data["name"]]


def walk(node):
    """Every view (dict with a mark) in a spec, depth first."""
    if isinstance(node, dict):
        if "mark" in node:
            yield node
        for key in ("layer", "vconcat", "hconcat", "concat"):
            for child in node.get(key, []):
                yield from walk(child)


def mark_type(view):
    mark = view["mark"]
    return mark["type"] if isinstance(mark, dict) else mark


# ---------------------------------------------------------------- helpers
def test_decimate_keeps_ends_and_a_spike():
    t = np.arange(10_000, dtype=float)
    y = np.zeros_like(t)
    y[5_432] = 9.0  # a one-sample spike must survive (a disturbed test has to look disturbed)
    idx = charts.decimate(t, y, 300)
    assert len(idx) <= 302
    assert idx[0] == 0 and idx[-1] == len(t) - 1
    assert 5_432 in idx
    assert np.all(np.diff(idx) > 0)


def test_decimate_matches_nanargmin_per_bucket():
    # reference: numpy's nanargmin / nanargmax on each bucket, one bucket at a time
    rng = np.random.default_rng(11)
    y = np.round(rng.normal(size=1_000), 1)  # rounding makes ties: the earliest one is kept
    y[100:140] = np.nan  # whole buckets of NaN keep their first sample
    y[rng.random(1_000) < 0.1] = np.nan
    points = 100
    edges = np.linspace(0, len(y), points // 2 + 1).astype(int)
    expected = {0, len(y) - 1}
    for lo, hi in zip(edges[:-1], edges[1:]):
        seg = y[lo:hi]
        if np.all(np.isnan(seg)):
            expected.add(lo)
        else:
            expected |= {lo + int(np.nanargmin(seg)), lo + int(np.nanargmax(seg))}
    assert charts.decimate(np.arange(len(y)), y, points).tolist() == sorted(expected)


def test_decimate_leaves_short_records_alone():
    t = np.arange(50.0)
    assert np.array_equal(charts.decimate(t, t, 300), np.arange(50))


def test_step_time_from_input():
    t, u, _, _ = fopdt(2.0, 10.0, 3.0, 5.0)
    assert charts.step_time_from_input(t, u) == pytest.approx(STEP_TIME, abs=PERIOD)
    assert charts.step_time_from_input(t, np.full_like(t, 4.0)) is None


# ---------------------------------------------------------- operating map
def test_operating_map_panels_units_and_points(campaign):
    params, _ = campaign
    spec = spec_of(charts.operating_map_chart(params, trend_frame(), units=UNITS))
    assert len(spec["concat"]) == 4
    titles = [panel["title"] for panel in spec["concat"]]
    assert titles == ["gain (cm/%)", "time constant (s)", "dead time (s)",
                      "gain / time constant (cm/%/s)"]
    points = dataset_rows(spec, spec["data"])
    # rejected test left out: 7 usable tests x 4 parameters
    assert len(points) == 7 * 4
    assert not any(p["test_id"] == "L80down" for p in points)
    ratio = [p for p in points if p["parameter"] == "gain_over_time_constant" and p["test_id"] == "L40up"]
    assert ratio[0]["value"] == pytest.approx(1.8 / 14.0, rel=1e-5)
    assert ratio[0]["lo"] <= ratio[0]["value"] <= ratio[0]["hi"]
    # conservative bounds from the interval ends: K_lo / tau_hi and K_hi / tau_lo
    assert ratio[0]["lo"] == pytest.approx(1.8 * 0.95 / (14.0 * 1.1), rel=1e-5)
    assert ratio[0]["hi"] == pytest.approx(1.8 * 1.05 / (14.0 * 0.9), rel=1e-5)


def test_operating_map_marks_error_bars_and_direction_encoding(campaign):
    params, _ = campaign
    spec = spec_of(charts.operating_map_chart(params, trend_frame(), units=UNITS))
    panel = spec["concat"][0]
    kinds = [mark_type(v) for v in panel["layer"]]
    assert kinds == ["area", "line", "rule", "point"]  # band, trend, 95 % bars, tests
    rule, point = panel["layer"][2], panel["layer"][3]
    assert rule["encoding"]["y"]["field"] == "lo" and rule["encoding"]["y2"]["field"] == "hi"
    assert rule["transform"] == [{"filter": "(datum.parameter === 'gain')"}]
    enc = point["encoding"]
    # up and down told apart by colour and by shape
    assert enc["color"]["field"] == "direction" and enc["shape"]["field"] == "direction"
    assert enc["color"]["scale"]["range"] == [charts.PALETTE["up"], charts.PALETTE["down"]]
    assert enc["shape"]["scale"]["range"] == ["triangle-up", "triangle-down"]
    assert enc["x"]["title"] == "operating level (cm)"
    band = dataset_rows(spec, panel["layer"][0]["data"])
    assert len(band) == 13 and band[0]["lo"] == pytest.approx(0.9 * 1.4)


def test_operating_map_without_trend_has_no_band(campaign):
    params, _ = campaign
    spec = spec_of(charts.operating_map_chart(params, None))
    assert [mark_type(v) for v in spec["concat"][1]["layer"]] == ["rule", "point"]
    assert spec["concat"][0]["title"] == "gain (output units/input units)"


def test_operating_map_missing_values_become_null(campaign):
    params, _ = campaign
    params = params.copy()
    params.loc[0, "gain_lo"] = np.nan
    params.loc[1, "time_constant"] = None
    spec = spec_of(charts.operating_map_chart(params, None))
    points = dataset_rows(spec, spec["data"])
    first = [p for p in points if p["test_id"] == "L20up" and p["parameter"] == "gain"][0]
    assert first["lo"] is None
    assert not [p for p in points if p["test_id"] == "L20down" and p["parameter"] == "time_constant"]


# --------------------------------------------------------------- overlay
def test_overlay_normalises_each_response(campaign):
    _, tests = campaign
    clean = []
    for test in tests:
        t, u, _, ideal = fopdt(test["gain"], test["time_constant"], test["dead_time"],
                               test["input_step"], n=2000)
        clean.append({**test, "t": t, "u": u, "y": ideal, "fitted": None})
    spec = spec_of(charts.overlay_chart(clean))
    rows = dataset_rows(spec, spec["data"])
    assert {r["test_id"] for r in rows} == {t["test_id"] for t in tests}
    for test in tests:
        mine = [r for r in rows if r["test_id"] == test["test_id"]]
        assert len(mine) <= charts.POINTS_PER_TEST // 2 + 2
        assert mine[-1]["response"] == pytest.approx(1.0, abs=1e-3)  # settled: its own change
        # every kept sample on the normalised exact response 1 - exp(-(t - theta)/tau),
        # which passes 1 - e^-1 = 0.632 one time constant after it starts (common practice)
        elapsed = np.array([r["elapsed"] for r in mine])
        expected = 1 - np.exp(-np.clip(elapsed - test["dead_time"], 0, None) / test["time_constant"])
        assert np.array([r["response"] for r in mine]) == pytest.approx(expected, abs=2e-3)
        assert elapsed.min() < 0 < test["dead_time"] + test["time_constant"] < elapsed.max()
    lines = spec["layer"][0]
    assert lines["encoding"]["color"]["scale"]["range"] == [charts.PALETTE[q] for q in
                                                            ("good", "suspect", "rejected")]
    assert lines["transform"][0]["lookup"] == "test_id"
    rules = dataset_rows(spec, spec["layer"][1]["data"])
    assert [r["r"] for r in rules] == pytest.approx([0.0, 1 - math.exp(-1), 1.0])


def test_overlay_scaled_time_and_skips(campaign):
    _, tests = campaign
    flat = {**tests[0], "test_id": "flat", "u": np.full(800, 40.0), "step_time": None}
    no_tau = {**tests[1], "test_id": "no_tau", "time_constant": None}
    spec = spec_of(charts.overlay_chart([tests[2], flat, no_tau], scale_time=True))
    rows = dataset_rows(spec, spec["data"])
    assert {r["test_id"] for r in rows} == {tests[2]["test_id"]}
    assert spec["layer"][0]["encoding"]["x"]["title"] == "time from step / time constant (-)"
    last = rows[-1]["elapsed"]
    assert last == pytest.approx((799 * PERIOD - STEP_TIME) / tests[2]["time_constant"], rel=1e-3)


def test_overlay_accepts_tuples(campaign):
    _, tests = campaign
    items = [(t, t["t"], t["u"], t["y"], t["fitted"], t["step_time"]) for t in tests[:2]]
    spec = spec_of(charts.overlay_chart(items))
    assert len({r["test_id"] for r in dataset_rows(spec, spec["data"])}) == 2


# --------------------------------------------------------------- one test
def test_step_test_chart_layers_marks_and_title(campaign):
    _, tests = campaign
    test = dict(tests[3], quality="suspect", flags=["disturbed", "small_step"])
    spec = spec_of(charts.step_test_chart(test, test["t"], test["u"], test["y"], test["fitted"],
                                          test["step_time"], units=UNITS))
    rows = dataset_rows(spec, spec["data"])
    assert len(rows) <= charts.POINTS_PER_TEST + 2
    assert set(rows[0]) == {"t", "y", "u", "fitted", "residual"}
    assert spec["title"]["text"].startswith("L40down: level 40 cm, down step")
    assert spec["title"]["subtitle"] == "quality: suspect; flags: disturbed, small_step"
    top, residual, input_panel = spec["vconcat"]
    assert residual["encoding"]["y"]["field"] == "residual"
    assert residual["encoding"]["y"]["title"] == "residual (cm)"
    assert input_panel["encoding"]["y"]["title"] == "input (%)"
    assert input_panel["mark"]["interpolate"] == "step-after"
    kinds = [mark_type(v) for v in top["layer"]]
    assert kinds == ["point", "line", "rule", "point", "text", "rule"]
    dead = dataset_rows(spec, top["layer"][2]["data"])[0]
    assert dead["dead_time_end"] == pytest.approx(STEP_TIME + 3.0)
    mark = dataset_rows(spec, top["layer"][3]["data"])[0]
    gain, tau, step = test["gain"], test["time_constant"], test["input_step"]
    assert mark["t63"] == pytest.approx(STEP_TIME + 3.0 + tau)
    # the 63.2 % point lies on the exact FOPDT response (common practice in the trade)
    exact = 100.0 + gain * step * (1 - math.exp(-1))
    assert mark["y63"] == pytest.approx(exact, rel=1e-5)
    assert top["layer"][3]["mark"]["color"] == charts.PALETTE["mark"]


def test_step_test_chart_without_fit(campaign):
    _, tests = campaign
    test = dict(tests[0], flags=[])
    spec = spec_of(charts.step_test_chart(test, test["t"], test["u"], test["y"]))
    assert len(spec["vconcat"]) == 2  # no residuals without a model
    assert [mark_type(v) for v in spec["vconcat"][0]["layer"]] == ["point", "rule"]
    step_rule = dataset_rows(spec, spec["vconcat"][0]["layer"][1]["data"])[0]
    assert step_rule["step"] == pytest.approx(STEP_TIME, abs=PERIOD)  # found from the input
    assert spec["title"]["subtitle"] == "quality: good"


def test_step_test_chart_keeps_hostile_text_as_data(campaign):
    _, tests = campaign
    evil = "<script>alert(1)</script>"
    test = dict(tests[0], test_id=evil)
    spec = spec_of(charts.step_test_chart(test, test["t"], test["u"], test["y"], test["fitted"]))
    assert spec["title"]["text"].startswith(evil)  # plain text; the report escapes it


# ---------------------------------------------------------- verdict charts
VERDICT = {
    "decision": "schedule",
    "controller": {"kc": 1.4, "ti": 12.0},
    "points": [{"level": 20.0, "ms": 1.5}, {"level": 50.0, "ms": 1.9}, {"level": 80.0, "ms": 2.4}],
    "schedule_points": [{"level": 20.0, "ms": 1.59}, {"level": 50.0, "ms": 1.59},
                        {"level": 80.0, "ms": 1.59}],
    "ms_max": 1.8,
    "schedule": [{"level": 50.0, "level_from": 35.0, "level_to": 65.0, "kc": 1.5},
                 {"level": 20.0, "level_from": 10.0, "level_to": 35.0, "kc": 2.0},
                 {"level": 80.0, "level_from": 65.0, "level_to": 90.0, "kc": 1.0}],
}


def test_margins_chart_limit_rule_and_series():
    spec = spec_of(charts.margins_chart(VERDICT, units=UNITS))
    lines, rule, label = spec["layer"]
    rows = dataset_rows(spec, lines["data"])
    assert [r["controller"] for r in rows].count("single") == 3
    assert [r["controller"] for r in rows].count("schedule") == 3
    assert lines["encoding"]["color"]["scale"]["range"] == [charts.PALETTE["single"],
                                                            charts.PALETTE["schedule"]]
    assert lines["encoding"]["strokeDash"]["field"] == "controller"  # not by colour alone
    assert lines["encoding"]["x"]["title"] == "operating level (cm)"
    assert mark_type(rule) == "rule"
    assert dataset_rows(spec, rule["data"])[0]["limit"] == 1.8
    assert dataset_rows(spec, label["data"])[0]["label"] == "limit Ms = 1.8"


def test_margins_chart_default_limit():
    spec = spec_of(charts.margins_chart({"points": [{"level": 1.0, "ms": 1.3}]}))
    # default limit 2.0: Åström & Hägglund give 1.2-2.0 as the usual range
    assert dataset_rows(spec, spec["layer"][1]["data"])[0]["limit"] == 2.0


def test_schedule_chart_is_a_step_chart():
    spec = spec_of(charts.schedule_chart(VERDICT, units=UNITS))
    step, tested, single, single_label = spec["layer"]
    assert dataset_rows(spec, single_label["data"])[0]["label"] == "single controller"
    assert step["mark"]["interpolate"] == "step-after"
    vertices = dataset_rows(spec, step["data"])
    assert [(v["level"], v["kc"]) for v in vertices] == [(10.0, 2.0), (35.0, 1.5), (65.0, 1.0),
                                                         (90.0, 1.0)]
    assert [v["tested"] for v in dataset_rows(spec, tested["data"])] == [20.0, 50.0, 80.0]
    assert step["encoding"]["y"]["title"] == "controller gain Kc (%/cm)"
    assert dataset_rows(spec, single["data"])[0]["kc"] == 1.4


def test_schedule_rows_without_band_edges_use_midpoints():
    rows = charts.schedule_rows({"schedule": [{"level": 20.0, "kc": 2.0}, {"level": 60.0, "kc": 1.0}]})
    assert [(r["level"], r["kc"]) for r in rows] == [(20.0, 2.0), (40.0, 1.0), (60.0, 1.0)]


def test_palette_roles_are_distinct():
    roles = ["up", "down", "single", "schedule", "mark", "suspect", "rejected"]
    assert len({charts.PALETTE[r] for r in roles}) == len(roles)


def test_unpack_accepts_a_result_object(campaign):
    _, tests = campaign
    test = tests[0]

    class Result:  # duck-typed stand-in for an identification result
        step_time = 20.0

        def fitted(self, t, u):
            return np.full_like(t, 7.0)

    row, t, u, y, fitted, step = charts.unpack_test((test, test["t"], test["u"], test["y"], Result()))
    assert step == 20.0 and np.all(fitted == 7.0) and len(t) == len(y) == 800


# ------------------------------------------------------------ fast specs
def inline_datasets(spec):
    """The spec with every named dataset put back inline, so names do not matter."""
    named = spec.get("datasets", {})

    def resolve(node):
        if isinstance(node, dict):
            if set(node) == {"name"} and node["name"] in named:
                return {"values": named[node["name"]]}
            return {k: resolve(v) for k, v in node.items() if k != "datasets"}
        if isinstance(node, list):
            return [resolve(v) for v in node]
        return node
    return resolve(spec)


@pytest.mark.parametrize("case", ["fitted", "no_fit", "nan_fit", "no_marks"])
def test_step_test_spec_equals_the_altair_chart(campaign, case):
    _, tests = campaign
    fast_specs = []
    for test in tests[:3]:  # the second and third reuse the cached layout
        test = dict(test, flags=["disturbed"] if test is tests[1] else [])
        fitted = {"fitted": test["fitted"], "no_fit": None, "no_marks": test["fitted"],
                  "nan_fit": np.full_like(test["fitted"], np.nan)}[case]
        if case == "no_marks":
            test["gain"] = None  # no model parameters: no 63.2 % point or dead-time mark
        args = (test, test["t"], test["u"], test["y"], fitted, test["step_time"])
        slow = spec_of(charts.step_test_chart(*args, units=UNITS))
        fast = charts.step_test_spec(*args, units=UNITS)
        json.dumps(fast, allow_nan=False)
        assert inline_datasets(fast) == inline_datasets(slow)
        fast_specs.append(fast)
    # each test's own rows and title, not the template's or another test's
    titles = [s["title"]["text"] for s in fast_specs]
    assert len(set(titles)) == 3
    rows = [dataset_rows(s, s["data"]) for s in fast_specs]
    assert rows[0] != rows[1] and all(r[0]["t"] == 0.0 for r in rows)


def test_step_test_spec_other_units_get_their_own_titles(campaign):
    _, tests = campaign
    test = tests[0]
    args = (test, test["t"], test["u"], test["y"], test["fitted"], test["step_time"])
    first = charts.step_test_spec(*args, units=UNITS)
    other = charts.step_test_spec(*args, units={"input": "mA", "output": "kPa"})
    assert other["vconcat"][-1]["encoding"]["y"]["title"] == "input (mA)"
    assert first["vconcat"][-1]["encoding"]["y"]["title"] == "input (%)"
    assert inline_datasets(other) == inline_datasets(spec_of(charts.step_test_chart(
        *args, units={"input": "mA", "output": "kPa"})))


def test_overlay_from_series_equals_overlay_chart(campaign):
    _, tests = campaign
    series = [charts.overlay_series(t) for t in tests]
    assert all(isinstance(s, charts.OverlaySeries) for s in series)
    assert all(len(s.elapsed) == len(s.response) <= charts.POINTS_PER_TEST // 2 + 2 for s in series)
    direct = spec_of(charts.overlay_chart(tests))
    assert inline_datasets(spec_of(charts.overlay_chart_from_series(series))) == inline_datasets(direct)
    assert charts.overlay_series({**tests[0], "u": np.full(800, 40.0), "step_time": None}) is None


def _closed_loop_verdict():
    from mapper.analysis.responses import response_rows

    points = [{"level": lv, "gain": 2.0 * lv / 20, "time_constant": 10.0 * lv / 20, "dead_time": 1.0,
               "kc_local": 2.5, "ti_local": 8.0, "ms": 1.6, "iae_ratio": 1.2, "kc": 2.0, "ti": 9.0}
              for lv in (20.0, 35.0, 50.0, 65.0, 80.0)]
    verdict = {"decision": "schedule", "controller": {"kc": 2.0, "ti": 9.0}, "points": points,
               "schedule_points": [dict(p, kc=2.4, ti=8.0, iae_ratio=1.05) for p in points],
               "ms_max": 1.8, "slowdown_max": 2.0}
    verdict["responses"] = response_rows(verdict)
    return verdict


def test_closed_loop_chart_three_levels_two_steps_three_controllers():
    verdict = _closed_loop_verdict()
    rows = verdict["responses"]
    # lowest, middle and highest tested level; load and setpoint step; single, schedule and local
    assert sorted({r["level"] for r in rows}) == [20.0, 50.0, 80.0]
    assert {r["step"] for r in rows} == {"load", "setpoint"}
    assert {r["controller"] for r in rows} == {"single", "schedule", "local"}
    setpoint = [r for r in rows if r["step"] == "setpoint" and r["controller"] == "local"]
    assert max(r["output"] for r in setpoint) > 0.9  # reaches the setpoint
    spec = spec_of(charts.closed_loop_chart(verdict, units=UNITS))
    assert spec["facet"]["column"]["field"] == "panel" and spec["facet"]["row"]["field"] == "step_name"
    assert "Ms <= 1.8" in spec["title"]["subtitle"][0] and "2 times" in spec["title"]["subtitle"][0]
    encoding = spec["spec"]["encoding"]
    assert encoding["strokeDash"]["field"] == "controller"  # not by colour alone
    assert encoding["color"]["scale"]["domain"] == ["single", "schedule", "local"]


def test_schedule_chart_of_interpolation_nodes_is_linear():
    # Rows with "band" are interpolation nodes: two rows with equal settings hold a band, and the
    # chart joins nodes linearly as the table tells the user to apply it.
    nodes = {"schedule": [
        {"level": 30.0, "level_from": 20.0, "level_to": 45.0, "band": 1, "kc": 2.0},
        {"level": 60.0, "level_from": 45.0, "level_to": 70.0, "band": 2, "kc": 1.5},
        {"level": 65.0, "level_from": 45.0, "level_to": 70.0, "band": 2, "kc": 1.5},
        {"level": 80.0, "level_from": 70.0, "level_to": 80.0, "band": 3, "kc": 1.0}]}
    spec = spec_of(charts.schedule_chart(nodes, units=UNITS))
    line = spec["layer"][0]
    assert line["mark"]["interpolate"] == "linear"
    assert [(v["level"], v["kc"]) for v in dataset_rows(spec, line["data"])] == [
        (20.0, 2.0), (30.0, 2.0), (60.0, 1.5), (65.0, 1.5), (80.0, 1.0), (80.0, 1.0)]
