"""Tests of the sample-campaign simulator (mapper.demo) and the committed sample folder."""

from __future__ import annotations

import csv
import math
import tomllib
from pathlib import Path

import numpy as np
import pytest

from mapper.demo import exchanger, scenario
from mapper.demo.exchanger import (
    CLEAN_EXCHANGER,
    FOULED_EXCHANGER,
    linearised_parameters,
    simulate_exchanger,
    valve_for_temperature,
)
from mapper.demo.scenario import write_sample_campaign

COMMITTED = Path(__file__).resolve().parents[1] / "sample_campaign"
CAMPAIGNS = ("exchanger_2026", "exchanger_2024")
FLOWS = (0.5, 1.0, 2.5)


@pytest.fixture(scope="module")
def generated(tmp_path_factory):
    folder = tmp_path_factory.mktemp("sample")
    summary = write_sample_campaign(folder)
    return folder, summary


def _read(path: Path) -> np.ndarray:
    return np.loadtxt(path, delimiter=",", skiprows=1)


def _tests(summary, campaign):
    return {t["file"]: t for c in summary["campaigns"] if c["folder"] == campaign
            for t in c["tests"]}


def _installed_flow_fraction(position_pct, authority):
    # Linear trim in series with line resistance: q/qmax = x / sqrt(N + (1 - N) x^2)
    # (installed-characteristic formula, textbook; from memory).
    x = position_pct / 100.0
    return x / math.sqrt(authority + (1.0 - authority) * x * x)


# ---------------------------------------------------------------- the committed folder

def test_regenerated_folder_matches_committed(generated):
    folder, _ = generated
    for campaign in CAMPAIGNS:
        fresh = sorted(p.name for p in (folder / campaign).iterdir())
        kept = sorted(p.name for p in (COMMITTED / campaign).iterdir())
        assert fresh == kept
        assert ((folder / campaign / "campaign.toml").read_bytes()
                == (COMMITTED / campaign / "campaign.toml").read_bytes())
        for name in fresh:
            if not name.endswith(".csv"):
                continue
            a, b = _read(folder / campaign / name), _read(COMMITTED / campaign / name)
            assert a.shape == b.shape, name
            # Written precision: time 0 decimals, valve 2, temperature 3; allow one last digit.
            assert np.array_equal(a[:, 0], b[:, 0]), name
            assert np.max(np.abs(a[:, 1] - b[:, 1])) <= 0.0101, name
            assert np.max(np.abs(a[:, 2] - b[:, 2])) <= 0.00101, name


def test_campaign_files_follow_the_format(generated):
    folder, summary = generated
    total = 0
    for campaign in CAMPAIGNS:
        with open(folder / campaign / "campaign.toml", "rb") as handle:
            spec = tomllib.load(handle)
        assert spec["name"]
        assert spec["columns"] == {"time": "t_s", "input": "steam_valve_pct",
                                   "output": "outlet_temp_c"}
        assert spec["ranges"] == {"input": [0, 100], "output": [0, 100]}
        files = [t["file"] for t in spec["tests"]]
        assert len(files) == len(set(files)) == len(_tests(summary, campaign))
        for test in spec["tests"]:
            path = folder / campaign / test["file"]
            with open(path, newline="") as handle:
                assert next(csv.reader(handle)) == ["t_s", "steam_valve_pct", "outlet_temp_c"]
            assert ("level" in test) == (campaign == "exchanger_2026")
            assert "kg/s" in test["note"]
            total += path.stat().st_size
    assert total < 1.5e6


def test_campaign_has_levels_directions_and_repeats(generated):
    _, summary = generated
    tests = _tests(summary, "exchanger_2026").values()
    levels = {t["nominal_level"] for t in tests}
    assert len(levels) >= 5
    for level in levels:
        assert {t["direction"] for t in tests if t["nominal_level"] == level} == {"up", "down"}
    counts = [sum(1 for t in tests if t["nominal_level"] == lv and t["direction"] == "up"
                  and t["defect"] == "none") for lv in levels]
    assert max(counts) >= 2
    assert sorted(t["defect"] for t in tests if t["defect"] != "none") == [
        "clipped", "cut_short", "disturbed"]
    older = _tests(summary, "exchanger_2024").values()
    assert 2 <= len({t["nominal_level"] for t in older}) < len(levels)


def test_clean_tests_are_settled_before_and_after(generated):
    folder, summary = generated
    for campaign in CAMPAIGNS:
        for name, truth in _tests(summary, campaign).items():
            t, u, y = _read(folder / campaign / name).T
            before = t < truth["step_time"]
            assert t[before][-1] - t[0] >= 55.0
            assert abs(np.mean(y[before]) - truth["output_before"]) < 0.35, name
            assert np.all(u[before] == truth["valve_before"])
            assert u[-1] == truth["valve_after"]
            if truth["defect"] == "none":
                tail = y[t > t[-1] - 0.5 * truth["time_constant"]]
                assert abs(np.mean(tail) - truth["output_after"]) < 0.35, name
                assert t[-1] - truth["step_time"] >= truth["dead_time"] + 5 * truth["time_constant"]
                # The data-derived level (mean of settled output before and after) sits at
                # the nominal level written in the campaign file.
                level = (np.mean(y[before]) + np.mean(tail)) / 2.0
                assert abs(level - truth["nominal_level"]) < 1.0, name


# ---------------------------------------------------------------- imperfect tests

def test_clipped_test_flat_tops_at_the_range(generated):
    folder, summary = generated
    name, truth = next((n, t) for n, t in _tests(summary, "exchanger_2026").items()
                       if t["defect"] == "clipped")
    y = _read(folder / "exchanger_2026" / name)[:, 2]
    assert np.max(y) == 100.0
    assert np.sum(y == 100.0) >= 10
    assert truth["output_after"] > 100.0  # the true response would have gone past the range


def test_cut_short_test_ends_before_three_time_constants(generated):
    folder, summary = generated
    name, truth = next((n, t) for n, t in _tests(summary, "exchanger_2026").items()
                       if t["defect"] == "cut_short")
    t, _, y = _read(folder / "exchanger_2026" / name).T
    assert t[-1] - truth["step_time"] < 3.0 * truth["time_constant"]
    change = truth["output_after"] - truth["output_before"]
    assert abs(y[-10:].mean() - truth["output_after"]) > 0.1 * abs(change)


def test_disturbed_test_dips_where_its_twin_does_not(generated):
    folder, summary = generated
    tests = _tests(summary, "exchanger_2026")
    name, truth = next((n, t) for n, t in tests.items() if t["defect"] == "disturbed")
    twin = next(n for n, t in tests.items() if t["defect"] == "none"
                and t["nominal_level"] == truth["nominal_level"]
                and t["direction"] == truth["direction"])

    def worst_fall(file):
        y = _read(folder / "exchanger_2026" / file)[:, 2]
        smooth = np.convolve(y, np.ones(15) / 15, mode="valid")
        return float(np.max(np.maximum.accumulate(smooth) - smooth))

    assert truth["direction"] == "up"
    assert worst_fall(name) > 1.0
    assert worst_fall(twin) < 0.3


# ---------------------------------------------------------------- physics

@pytest.mark.parametrize("flow", FLOWS)
def test_steady_state_energy_balance(flow):
    p = CLEAN_EXCHANGER
    start, end, inlet = 30.0, 36.0, 15.0
    valve = exchanger.valve_ramp(start, [(10.0, end)], p.valve_rate)
    t = np.arange(0.0, 2500.0, 5.0)
    run = simulate_exchanger(t, valve, flow=flow, inlet_temperature=inlet, parameters=p)
    # Independent balance: Q = w_steam,max * f(x) * latent heat = w c (T_out - T_in).
    steam_heat = p.steam_capacity * _installed_flow_fraction(end, p.valve_authority) * p.latent_heat
    water_heat = flow * p.specific_heat * (run.outlet_temperature[-1] - inlet)
    assert water_heat == pytest.approx(steam_heat, rel=1e-5)
    assert run.steam_heat[-1] == pytest.approx(steam_heat, rel=1e-9)
    assert run.wall_temperature[-1] - run.water_temperature[-1] == pytest.approx(
        steam_heat / p.wall_conductance, rel=1e-4)


@pytest.mark.parametrize("flow", FLOWS)
def test_linearised_model_matches_a_small_step(flow):
    p = CLEAN_EXCHANGER
    x0, dx, step_time = valve_for_temperature(flow, 45.0), 0.1, 20.0
    lin = linearised_parameters(flow, x0)
    t = np.arange(0.0, 20.0 * lin["time_constant"], 1.0)
    run = simulate_exchanger(t, lambda s: x0 + dx * (s >= step_time), flow=flow, parameters=p)
    response = run.outlet_temperature - run.outlet_temperature[0]
    gain = response[-1] / dx
    assert gain == pytest.approx(lin["gain"], rel=2e-3)

    # Exact linear response of three distinct lags behind a pure delay:
    # y = K dx (1 - sum_i c_i exp(-s/tau_i)), c_i = prod_{j != i} tau_i / (tau_i - tau_j)
    # (partial fractions, textbook).
    lags = lin["lags"]
    s = np.clip(t - step_time - lin["transport_delay"], 0.0, None)
    tail = sum(math.prod(ti / (ti - tj) for tj in lags if tj != ti) * np.exp(-s / ti)
               for ti in lags)
    analytic = lin["gain"] * dx * (1.0 - tail)
    assert np.max(np.abs(response - analytic)) < 0.01 * lin["gain"] * dx

    # Nothing moves before the pipe delay has passed (plug flow).
    quiet = t < step_time + lin["transport_delay"] - 1e-6
    assert np.max(np.abs(response[quiet])) < 1e-6 * lin["gain"] * dx

    # The half-rule first-order-plus-dead-time model stays close to the true response.
    fopdt = lin["gain"] * dx * (1.0 - np.exp(-np.clip(t - step_time - lin["dead_time"], 0.0, None)
                                             / lin["time_constant"]))
    assert np.max(np.abs(response - fopdt)) < 0.05 * lin["gain"] * dx


def test_gain_time_constant_and_dead_time_fall_as_flow_rises(generated):
    _, summary = generated
    rows = sorted((t for t in _tests(summary, "exchanger_2026").values()
                   if t["direction"] == "up" and t["defect"] == "none"),
                  key=lambda t: t["flow"])
    flows = [r["flow"] for r in rows]
    assert len(set(flows)) >= 5
    for key in ("gain", "time_constant", "dead_time"):
        by_flow = {r["flow"]: r[key] for r in rows}
        values = [by_flow[f] for f in sorted(by_flow)]
        assert all(a > b for a, b in zip(values, values[1:])), key
    # and the flow scale itself: the plug-flow delay is pipe holdup / flow
    for r in rows:
        holdup = CLEAN_EXCHANGER.water_density * CLEAN_EXCHANGER.pipe_volume
        assert r["transport_delay"] == pytest.approx(holdup / r["flow"])


def test_fouled_exchanger_is_slower_with_less_gain():
    for flow in FLOWS:
        valve = valve_for_temperature(flow, 50.0, parameters=CLEAN_EXCHANGER)
        clean = linearised_parameters(flow, valve, parameters=CLEAN_EXCHANGER)
        fouled = linearised_parameters(flow, valve, parameters=FOULED_EXCHANGER)
        assert fouled["gain"] < clean["gain"]
        assert fouled["time_constant"] > clean["time_constant"]
        assert fouled["dead_time"] > clean["dead_time"]


def test_unreachable_temperature_is_refused():
    with pytest.raises(ValueError, match="full steam"):
        valve_for_temperature(0.5, 300.0)


def test_command_line_writes_both_campaigns(tmp_path, capsys):
    assert scenario.main(["--write", str(tmp_path), "--seed", "7"]) == 0
    assert "18 tests" in capsys.readouterr().out
    for campaign in CAMPAIGNS:
        assert (tmp_path / campaign / "campaign.toml").is_file()
    # another seed changes the noise, not the plan
    a = _read(tmp_path / "exchanger_2026" / "t064_up_1.csv")
    b = _read(COMMITTED / "exchanger_2026" / "t064_up_1.csv")
    assert a.shape == b.shape and not np.allclose(a[:, 2], b[:, 2])
