"""Tests of mapper.analysis.opmap (trends, bands, lookups) and mapper.analysis.compare (repeats, directions, campaigns)."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from scipy.integrate import solve_ivp

from mapper.analysis.compare import bonferroni_point, compare_campaigns, compare_directions, compare_repeats
from mapper.analysis.opmap import build_map, parameter_values
from mapper.analysis.trends import cluster_levels, fit_trend
from mapper.errors import DataError, OutOfRangeError

Z = 1.959963984540054


def make_params(levels, truth, *, seed=0, rel_sd=0.025, dead_time_sd=0.05, directions=("up", "down"),
                repeats=1, campaign="A", model="fopdt", scatter=1.0):
    """A test_params frame from known parameters: values drawn with sd `scatter` times the stated one."""
    rng = np.random.default_rng(seed)
    rows = []
    for level in levels:
        for direction in directions:
            for _ in range(repeats):
                gain, tau, theta = truth(level)
                sk, st = rel_sd * abs(gain), rel_sd * (tau or 0.0)
                k = gain + scatter * sk * rng.standard_normal()
                ta = None if tau is None else tau + scatter * st * rng.standard_normal()
                th = max(theta + scatter * dead_time_sd * rng.standard_normal(), 0.0)
                rows.append({
                    "test_id": len(rows) + 1, "campaign": campaign, "file": f"step_{len(rows)}.csv",
                    "level": level + 0.002 * rng.standard_normal(), "direction": direction,
                    "input_step": 1.0 if direction == "up" else -1.0, "model": model,
                    "gain": k, "gain_lo": k - Z * sk, "gain_hi": k + Z * sk,
                    "time_constant": ta, "time_constant_lo": None if ta is None else ta - Z * st,
                    "time_constant_hi": None if ta is None else ta + Z * st,
                    "dead_time": th, "dead_time_lo": max(th - Z * dead_time_sd, 0.0),
                    "dead_time_hi": th + Z * dead_time_sd, "nrmse": 0.02, "quality": "good", "flags": []})
    return pd.DataFrame(rows)


def gravity_tank(h, area=2.0, c=1.0, dead_time=0.5):
    # A dh/dt = q - c sqrt(h): K = 2 sqrt(h)/c, tau = 2 A sqrt(h)/c (textbook linearisation, e.g.
    # Seborg et al.; from memory).
    return 2 * math.sqrt(h) / c, 2 * area * math.sqrt(h) / c, dead_time


LEVELS = [1.0, 1.5, 2.25, 3.0, 4.0]


def test_small_step_simulation_agrees_with_textbook_linearisation():
    area, c, h0 = 2.0, 1.0, 2.25
    q0 = c * math.sqrt(h0)
    dq = 0.005 * q0
    sol = solve_ivp(lambda t, h: [(q0 + dq - c * math.sqrt(h[0])) / area], (0, 150), [h0],
                    t_eval=np.linspace(0, 150, 15001), rtol=1e-10, atol=1e-12)
    rise = sol.y[0] - h0
    gain = rise[-1] / dq
    t63 = float(np.interp(0.632 * rise[-1], rise, sol.t))  # 63.2 % point (common practice)
    k_ref, tau_ref, _ = gravity_tank(h0, area, c)
    assert gain == pytest.approx(k_ref, rel=0.01)
    assert t63 == pytest.approx(tau_ref, rel=0.01)


def test_gravity_tank_map_gain_and_lag_move_ratio_does_not():
    params = make_params(LEVELS, gravity_tank, seed=3)
    m = build_map(params)
    rows = {r["parameter"]: r for r in m.summary()}
    assert rows["gain"]["significant"] and rows["time_constant"]["significant"]
    assert not rows["dead_time"]["significant"] and rows["dead_time"]["shape"] == "constant"
    assert not rows["gain_over_time_constant"]["significant"]
    assert rows["gain"]["ratio"] == pytest.approx(2.0, rel=0.1)
    assert rows["time_constant"]["ratio"] == pytest.approx(2.0, rel=0.1)
    # K/tau = 1/A = 0.5 (textbook linearisation above).
    value, lo, hi = m.value("gain_over_time_constant", 2.0)
    assert lo < 0.5 < hi
    assert "AICc" in rows["gain"]["reason"]


def test_at_inside_outside_and_extrapolated():
    m = build_map(make_params(LEVELS, gravity_tank, seed=4))
    got = m.at(2.25)
    assert set(got) == {"level", "gain", "gain_lo", "gain_hi", "time_constant", "time_constant_lo",
                        "time_constant_hi", "dead_time", "dead_time_lo", "dead_time_hi"}
    k, tau, theta = gravity_tank(2.25)
    for name, truth in (("gain", k), ("time_constant", tau), ("dead_time", theta)):
        assert got[f"{name}_lo"] < got[name] < got[f"{name}_hi"]
        assert got[name] == pytest.approx(truth, rel=0.04)
    with pytest.raises(OutOfRangeError) as err:
        m.at(6.0)
    assert "outside the tested range" in str(err.value)
    assert f"{m.level_min:.2f}" in str(err.value) and f"{m.level_max:.2f}" in str(err.value)
    assert isinstance(err.value, ValueError)
    far = m.at(6.0, extrapolate=True)
    assert "warning" in far and far["gain"] > got["gain"]


def test_band_covers_a_straight_truth_about_95_percent_of_the_time():
    # A 95 % confidence band of a correctly shaped trend should cover the truth in about 95 % of
    # campaigns (definition of a confidence band); allow sampling slack over 60 seeded campaigns.
    def truth(level):
        return 1.0 + 0.5 * level, 10.0 + 2.0 * level, 1.0

    covered = 0
    for seed in range(60):
        got = build_map(make_params(LEVELS, truth, seed=100 + seed)).at(2.5)
        covered += got["gain_lo"] < truth(2.5)[0] < got["gain_hi"]
    assert covered >= 51


def test_noise_free_line_recovers_polyfit():
    x = np.array([10.0, 20.0, 30.0, 40.0, 50.0, 60.0])
    y = 1.5 + 0.03 * x
    trend = fit_trend(x, y, np.full(6, 0.01), "gain")
    assert trend.shape == "linear" and trend.significant
    slope, intercept = np.polyfit(x, y, 1)  # numpy reference
    assert trend.evaluate(0.0) == pytest.approx((intercept, intercept, intercept), abs=0.05)
    assert trend.evaluate(35.0)[0] == pytest.approx(slope * 35.0 + intercept, rel=1e-9)
    assert trend.extra_scatter == 0.0


def test_shapes_chosen_by_aicc():
    rng = np.random.default_rng(11)
    x = np.repeat(np.linspace(0, 100, 7), 2)
    sigma = np.full(x.size, 0.02)
    flat = fit_trend(x, 3.0 + 0.02 * rng.standard_normal(x.size), sigma, "gain")
    assert flat.shape == "constant" and not flat.significant and flat.p_value is None
    curved = fit_trend(x, 1.0 + 4e-4 * (x - 50) ** 2 + 0.02 * rng.standard_normal(x.size), sigma, "gain")
    assert curved.shape == "quadratic" and curved.significant
    # Two levels only: at most a line.
    two = fit_trend(np.array([0, 0, 100, 100.0]), np.array([1.0, 1.01, 2.0, 2.02]), np.full(4, 0.01), "gain")
    assert two.shape in ("constant", "linear")


def test_extra_scatter_reduces_to_ordinary_least_squares():
    # Intervals far narrower than the scatter and no repeats: the extra scatter comes from the
    # reference model (the quadratic, richest polynomial leaving residual degrees of freedom), so
    # s^2 -> its residual variance RSS/(n-3) (numpy polyfit), never from the misfit of the shape judged;
    # the constant's band is then the t interval of the mean with that scatter (textbook t interval).
    rng = np.random.default_rng(5)
    y = 2.0 + 0.1 * rng.standard_normal(12)
    x = np.linspace(0, 1, 12)
    trend = fit_trend(x, y, np.full(12, 1e-6), "gain")
    assert trend.shape == "constant"
    residual = y - np.polyval(np.polyfit(x, y, 2), x)
    scatter = math.sqrt(np.sum(residual ** 2) / (12 - 3))
    assert trend.extra_scatter == pytest.approx(scatter, rel=1e-3)
    value, lo, hi = trend.evaluate(0.5)
    half = stats.t.ppf(0.975, 9) * scatter / math.sqrt(12)
    assert value == pytest.approx(np.mean(y), rel=1e-9)
    weight, coefficients, covariance, quantile = trend.alternatives[0]
    assert len(coefficients) == 1
    assert quantile * math.sqrt(covariance[0][0]) == pytest.approx(half, rel=1e-3)
    # The reported band adds shape uncertainty (other shapes, Akaike-weighted), so it is no narrower.
    assert half * (1 - 1e-6) <= hi - value < 1.5 * half


def test_consistent_intervals_give_weighted_mean_band():
    y = np.array([1.0, 1.02, 0.99, 1.01])
    trend = fit_trend(np.arange(4.0), y, np.full(4, 0.05), "gain")
    assert trend.extra_scatter == 0.0
    value, lo, hi = trend.evaluate(1.5)
    assert value == pytest.approx(y.mean())
    # 1.96 sigma / sqrt(n); the log-scale shapes averaged into the band differ from it by parts in 1e7.
    assert hi - value == pytest.approx(Z * 0.05 / 2.0, rel=1e-5)


def test_gain_over_time_constant_interval_propagation():
    params = make_params([1.0], gravity_tank, directions=("up",), seed=1)
    value, sigma = parameter_values(params, "gain_over_time_constant")
    row = params.iloc[0]
    rel = math.hypot((row.gain_hi - row.gain_lo) / (2 * Z * row.gain),
                     (row.time_constant_hi - row.time_constant_lo) / (2 * Z * row.time_constant))
    assert value[0] == pytest.approx(row.gain / row.time_constant)
    assert sigma[0] == pytest.approx(value[0] * rel)  # first-order propagation, independent errors


def test_rejected_tests_left_out_and_against_other_column():
    params = make_params(LEVELS, gravity_tank, seed=2)
    wild = params.iloc[[0]].copy()
    wild[["gain", "gain_lo", "gain_hi"]] = [100.0, 99.0, 101.0]
    wild["quality"] = "rejected"
    base = build_map(params)
    with_wild = build_map(pd.concat([params, wild], ignore_index=True))
    assert with_wild.n_tests == base.n_tests
    assert with_wild.at(2.0)["gain"] == pytest.approx(base.at(2.0)["gain"])
    params["valve_position"] = 20.0 * params["level"]
    by_valve = build_map(params, against="valve_position")
    assert by_valve.level_max == pytest.approx(20 * base.level_max)
    assert by_valve.at(40.0)["gain"] == pytest.approx(base.at(2.0)["gain"], rel=1e-6)
    with pytest.raises(DataError, match="nozzle"):
        build_map(params, against="nozzle")


def test_integrating_map_and_trend_frame():
    params = make_params(LEVELS, lambda h: (0.02 * h, None, 3.0), model="integrating", seed=8)
    m = build_map(params)
    assert m.model == "integrating" and set(m.trends) == {"gain", "dead_time"}
    got = m.at(2.0)
    assert got["time_constant"] is None and got["gain"] == pytest.approx(0.04, rel=0.05)
    frame = m.trend_frame(points=50)
    assert list(frame.columns) == ["parameter", "level", "value", "lo", "hi"]
    assert len(frame) == 100 and (frame["lo"] <= frame["value"]).all() and (frame["value"] <= frame["hi"]).all()
    mixed = pd.concat([params, make_params([2.0], gravity_tank, directions=("up",))], ignore_index=True)
    assert build_map(mixed).model == "integrating" and build_map(mixed).notes


def test_missing_intervals_give_unknown_band_not_a_false_one():
    params = make_params(LEVELS, gravity_tank, seed=6)
    for column in ("gain_lo", "gain_hi", "time_constant_lo", "time_constant_hi", "dead_time_lo", "dead_time_hi"):
        params[column] = None
    one = build_map(params.iloc[:1])
    got = one.at(float(params["level"].iloc[0]))
    assert got["gain"] == pytest.approx(params["gain"].iloc[0]) and got["gain_lo"] is None
    assert "band_unknown" in one.trend("gain").flags
    # Many tests without intervals: the scatter between them sets the band (ordinary least squares).
    many = build_map(params).at(2.0)
    assert many["gain_lo"] < many["gain"] < many["gain_hi"]
    assert "no_intervals" in build_map(params).trend("gain").flags


def test_cluster_levels():
    assert list(cluster_levels([40.01, 39.98, 60.0, 80.2, 80.0])) == [0, 0, 1, 2, 2]


# --- comparisons -----------------------------------------------------------------------------------

def test_repeats_consistent_and_too_scattered():
    good = make_params([2.0], gravity_tank, directions=("up",), repeats=6, seed=12)
    rows = {r["parameter"]: r for r in compare_repeats(good)}
    assert rows["gain"]["n_tests"] == 6 and rows["gain"]["dof"] == 5
    assert rows["gain"]["consistent"] and "consistent" in rows["gain"]["sentence"]
    bad = make_params([2.0], gravity_tank, directions=("up",), repeats=6, seed=12, scatter=6.0)
    rows = {r["parameter"]: r for r in compare_repeats(bad)}
    assert not rows["gain"]["consistent"] and rows["gain"]["scatter_ratio"] > 2
    assert "wider than their intervals" in rows["gain"]["sentence"]


def test_comparison_tails_are_those_of_scipy_stats():
    # reference: scipy.stats (normal upper point, chi-square survival function)
    for count in (1, 3, 12, 40):
        assert bonferroni_point(count) == pytest.approx(stats.norm.isf(0.025 / count), rel=1e-12)
    assert bonferroni_point(1) == pytest.approx(1.959964, abs=1e-6)  # two-sided 95 % normal point (tables)
    for seed, scatter in ((12, 1.0), (12, 6.0)):
        params = make_params([2.0], gravity_tank, directions=("up",), repeats=6, seed=seed, scatter=scatter)
        for row in compare_repeats(params):
            assert row["p_value"] == pytest.approx(stats.chi2.sf(row["chi_square"], row["dof"]), rel=1e-12)


def test_up_down_difference_flagged_with_causes():
    params = make_params([1.0, 2.0, 3.0], gravity_tank, repeats=2, seed=13)
    down = params["direction"] == "down"
    params.loc[down & (params["level"] > 2.5), ["gain", "gain_lo", "gain_hi"]] *= 0.75
    rows = compare_directions(params)
    gain_rows = {round(r["level"]): r for r in rows if r["parameter"] == "gain"}
    assert gain_rows[3]["differs"] and "deadband or sticking valve" in gain_rows[3]["sentence"]
    assert "asymmetric process" in gain_rows[3]["sentence"]
    assert not gain_rows[1]["differs"] and "agree" in gain_rows[1]["sentence"]


def test_campaigns_compared():
    old = make_params(LEVELS, gravity_tank, seed=20, campaign="spring")
    new = make_params(LEVELS, lambda h: (gravity_tank(h)[0], 1.3 * gravity_tank(h)[1], 0.5), seed=21,
                      campaign="autumn")
    rows = {r["parameter"]: r for r in compare_campaigns(old, new)}
    assert rows["time_constant"]["moved"] and rows["time_constant"]["change"] == pytest.approx(0.3, abs=0.08)
    assert "spring" in rows["time_constant"]["sentence"] and "autumn" in rows["time_constant"]["sentence"]
    assert not rows["gain"]["moved"] and "did not move" in rows["gain"]["sentence"]
    apart = compare_campaigns(old, make_params([8.0, 9.0], gravity_tank, seed=22))
    assert apart[0]["parameter"] is None and "no tested range" in apart[0]["sentence"]
