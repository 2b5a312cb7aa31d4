"""Identification: estimators, accuracy, uncertainty and hard cases.

Reference values carry their source beside them. Synthetic tests are seeded.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.signal import lfilter

from mapper.errors import DataError, IdentificationError
from mapper.identification.identify import ESTIMATORS, FitResult, identify
from mapper.identification.models import simulate_fopdt, simulate_integrating, step_response
from mapper.identification.point_methods import two_point_coefficients
from mapper.identification.uncertainty import cramer_rao_sd, t_quantile

ROW_KEYS = {
    "model", "method", "gain", "gain_lo", "gain_hi", "time_constant", "time_constant_lo",
    "time_constant_hi", "dead_time", "dead_time_lo", "dead_time_hi", "nrmse", "quality",
    "flags", "input_step", "step_time", "y_before", "y_after", "settings",
}  # fmt: skip


def fopdt_test(K, tau, theta, *, T=1.0, t_step=20.0, settle=6.0, ramp=0.0, noise=0.0,
               rng=None, u_level=40.0, u_step=10.0, y_level=25.0):  # fmt: skip
    """Synthetic step test of an exact FOPDT plant: returns t, u, y, noise sd."""
    n = int((t_step + theta + settle * tau) / T) + 10
    t = np.arange(n) * T
    if ramp > 0:
        u = u_level + u_step * np.clip((t - t_step) / ramp, 0.0, 1.0)
    else:
        u = u_level + u_step * (t >= t_step)
    y = simulate_fopdt(u, T, K, tau, theta) + y_level
    sd = noise * abs(K * u_step)
    if sd and rng is not None:
        y = y + rng.normal(0.0, sd, n)
    return t, u, y, sd


# --- published coefficients and check values ------------------------------------------


def test_two_point_coefficients_against_published_values():
    # Smith (1972): tau = 1.5 (t63.2 - t28.3), theta = t63.2 - tau
    c_tau, c1, c2 = two_point_coefficients(0.283, 0.632)
    assert c_tau == pytest.approx(1.5, abs=0.005)
    assert c1 - c2 * 1.0 == pytest.approx(1.0, abs=1e-12)  # theta = c1 t1 - c2 t2
    # Sundaresan & Krishnaswamy (1978), published rounded: tau = 0.67 (t2 - t1),
    # theta = 1.3 t1 - 0.29 t2
    c_tau, c1, c2 = two_point_coefficients(0.353, 0.853)
    assert round(c_tau, 2) == 0.67 and round(c1, 1) == 1.3 and round(c2, 2) == 0.29


def test_rounded_sundaresan_coefficients_read_dead_time_about_4_percent_high():
    # Design brief: the published rounded coefficients give theta about 4 % high on an
    # exact model (tau=10, theta=3); the exact coefficients give it exactly.
    tau, theta = 10.0, 3.0
    t1 = theta - tau * math.log(1 - 0.353)
    t2 = theta - tau * math.log(1 - 0.853)
    rounded = 1.3 * t1 - 0.29 * t2
    assert 0.03 < rounded / theta - 1 < 0.05
    c_tau, c1, c2 = two_point_coefficients(0.353, 0.853)
    assert c1 * t1 - c2 * t2 == pytest.approx(theta, rel=1e-12)
    assert c_tau * (t2 - t1) == pytest.approx(tau, rel=1e-12)


def test_cramer_rao_check_value():
    # Design brief check value (Fisher information J'J/sigma^2; a 400-run Monte Carlo
    # of an output-error fit gave 0.0105, 0.186, 0.125): K=2, tau=10, theta=3, step of
    # 1 at t=10, T=0.5, record 0-110, sigma=0.05, offset free.
    t = np.arange(0.0, 110.0 + 1e-9, 0.5)
    u = (t >= 10.0).astype(float)
    sd = cramer_rao_sd(t, u, 2.0, 10.0, 3.0, 0.05)
    assert sd["gain"] == pytest.approx(0.0107, rel=0.01)
    assert sd["time_constant"] == pytest.approx(0.1885, rel=0.01)
    assert sd["dead_time"] == pytest.approx(0.1297, rel=0.01)


def test_t_quantile_against_tables():
    # Student-t 97.5 % points (standard tables): dof 10 -> 2.228, 30 -> 2.042, inf -> 1.960
    assert t_quantile(10) == pytest.approx(2.228, abs=0.003)
    assert t_quantile(30) == pytest.approx(2.042, abs=0.002)
    assert t_quantile(1e9) == pytest.approx(1.960, abs=0.001)


# --- methods on noise-free data ---------------------------------------------------------


def test_methods_cross_check_on_noise_free_data():
    K, tau, theta = -1.5, 20.0, 5.3
    t, u, y, _ = fopdt_test(K, tau, theta, T=0.5, settle=10.0)
    results = {m: identify(t, u, y, method=m) for m in ESTIMATORS}
    ls = results["least_squares"]
    assert ls.gain == pytest.approx(K, rel=1e-6)
    assert ls.time_constant == pytest.approx(tau, rel=1e-5)
    assert ls.dead_time == pytest.approx(theta, abs=1e-4)
    for name, r in results.items():
        assert r.model == "fopdt" and r.method == name
        assert r.gain == pytest.approx(ls.gain, rel=0.005), name
        assert r.time_constant == pytest.approx(ls.time_constant, rel=0.03), name
        assert abs(r.dead_time - ls.dead_time) <= 2 * 0.5, name
        assert r.quality == "good", (name, r.flags)


def test_graphical_method_reads_63_percent_one_time_constant_after_response_starts():
    # Common practice: the 63.2 % point lies one time constant after the response starts.
    t, u, y, _ = fopdt_test(3.0, 12.0, 4.0, T=0.1, settle=10.0)
    r = identify(t, u, y, method="graphical")
    assert r.time_constant == pytest.approx(12.0, rel=0.02)
    assert r.dead_time == pytest.approx(4.0, abs=0.1 + 0.02 * 12.0)


def test_area_method_is_exact_on_fopdt():
    # Åström & Hägglund (1995): A0 = theta + tau, tau = e * A1, exact for FOPDT.
    t, u, y, _ = fopdt_test(0.8, 15.0, 6.0, T=0.1, settle=15.0)
    r = identify(t, u, y, method="area")
    assert r.time_constant == pytest.approx(15.0, rel=0.005)
    assert r.dead_time == pytest.approx(6.0, abs=0.1)


@pytest.mark.parametrize("method", ["smith", "sundaresan"])
def test_two_point_methods_exact_on_noise_free_data(method):
    t, u, y, _ = fopdt_test(2.0, 10.0, 3.0, T=0.05, settle=8.0)
    r = identify(t, u, y, method=method)
    assert r.time_constant == pytest.approx(10.0, rel=0.005)
    assert r.dead_time == pytest.approx(3.0, abs=0.05)
    assert r.gain_lo is None and any("no interval" in n for n in r.notes)


# --- accuracy of the default estimator --------------------------------------------------


def test_least_squares_accuracy_over_dead_time_ratios():
    # Targets: 2 % noise -> gain within 3 %, time constant within 6 %, dead time within
    # one sample (or 2.5 Cramér-Rao sd if larger) for >= 95 % of tests, theta/tau 0.01..1,
    # with and without short actuator ramps.
    rng = np.random.default_rng(2024)
    hits = total = 0
    for ratio in np.geomspace(0.01, 1.0, 10):
        for ramp in (0.0, 4.0):
            for _ in range(3):
                tau = rng.uniform(8.0, 40.0)
                K = rng.choice([-1, 1]) * rng.uniform(0.2, 3.0)
                t, u, y, sd = fopdt_test(K, tau, ratio * tau, ramp=ramp, noise=0.02, rng=rng,
                                         t_step=rng.uniform(15, 40))  # fmt: skip
                r = identify(t, u, y)
                crb = cramer_rao_sd(t, u, K, tau, ratio * tau, sd)
                total += 1
                hits += (
                    abs(r.gain / K - 1) <= 0.03
                    and abs(r.time_constant / tau - 1) <= 0.06
                    and abs(r.dead_time - ratio * tau) <= max(1.0, 2.5 * crb["dead_time"])
                )
    assert hits >= 0.95 * total, (hits, total)


def _crb_example():
    t = np.arange(0.0, 110.0 + 1e-9, 0.5)
    u = (t >= 10.0).astype(float)
    return t, u, simulate_fopdt(u, 0.5, 2.0, 10.0, 3.0)


@pytest.mark.parametrize("phi", [0.0, 0.7])
def test_intervals_are_honest_under_white_and_autocorrelated_noise(phi):
    # Coverage >= 90 % of nominal 95 % intervals, median width within 2.5x the
    # Cramér-Rao width (Fisher information with the true noise model), and for white
    # noise a Monte Carlo spread within 1.3x the Cramér-Rao sd.
    t, u, y0 = _crb_example()
    truth = {"gain": 2.0, "time_constant": 10.0, "dead_time": 3.0}
    crb = cramer_rao_sd(t, u, 2.0, 10.0, 3.0, 0.05, autocorrelation=phi)
    rng = np.random.default_rng(99 if phi else 98)
    runs = 250
    inside = {k: 0 for k in truth}
    widths = {k: [] for k in truth}
    values = {k: [] for k in truth}
    for _ in range(runs):
        innovation = rng.normal(0.0, 0.05 * math.sqrt(1 - phi**2), t.size)
        noise = lfilter([1.0], [1.0, -phi], innovation, zi=[phi * rng.normal(0.0, 0.05)])[0]
        r = identify(t, u, y0 + noise)
        for k, true in truth.items():
            lo, hi = getattr(r, k + "_lo"), getattr(r, k + "_hi")
            inside[k] += lo <= true <= hi
            widths[k].append(hi - lo)
            values[k].append(getattr(r, k))
    for k in truth:
        assert inside[k] >= 0.90 * runs, (k, inside[k])
        assert np.median(widths[k]) <= 2.5 * 2 * 1.96 * crb[k], k
        if phi == 0.0:
            assert np.std(values[k]) <= 1.3 * crb[k], k


# --- outside plants and models ------------------------------------------------------------


def test_gravity_drained_tank_linearisation():
    # Textbook linearisation of A dh/dt = q - c sqrt(h) (e.g. Seborg et al.; from memory):
    # K = 2 sqrt(h)/c, tau = 2 A sqrt(h)/c. Plant simulated with scipy's solve_ivp.
    A, c, h0 = 2.0, 0.5, 4.0
    q0 = c * math.sqrt(h0)
    dq = 0.01 * q0
    T = 0.5
    t = np.arange(0.0, 200.0, T)
    q = np.where(t >= 20.0, q0 + dq, q0)
    sol = solve_ivp(lambda s, h: [(q0 + dq * (s >= 20.0) - c * math.sqrt(max(h[0], 0.0))) / A],
                    (0.0, t[-1]), [h0], t_eval=t, max_step=0.05, rtol=1e-10, atol=1e-12)  # fmt: skip
    h = sol.y[0] + np.random.default_rng(5).normal(0.0, 0.002 * abs(8.0 * dq), t.size)
    r = identify(t, q, h)
    assert r.model == "fopdt" and r.quality == "good", r.flags
    assert r.gain == pytest.approx(2 * math.sqrt(h0) / c, rel=0.02)
    assert r.time_constant == pytest.approx(2 * A * math.sqrt(h0) / c, rel=0.03)
    assert r.dead_time <= T
    assert r.gain / r.time_constant == pytest.approx(1.0 / A, rel=0.03)


def test_level_that_never_settles_gets_an_integrating_model():
    rng = np.random.default_rng(8)
    T, k, theta = 1.0, 0.02, 6.0
    t = np.arange(0.0, 400.0, T)
    u = np.where(t >= 50.0, 55.0, 50.0)
    y = simulate_integrating(u, T, k, theta, y0=40.0) + rng.normal(0.0, 0.05, t.size)
    r = identify(t, u, y)
    assert r.model == "integrating" and r.time_constant is None
    assert r.gain == pytest.approx(k, rel=0.03)
    assert r.gain_lo < k < r.gain_hi
    assert abs(r.dead_time - theta) <= 2 * T
    graphical = identify(t, u, y, method="graphical")
    assert graphical.model == "integrating" and graphical.method == "least_squares"


def test_scale_invariance_tiny_and_huge_time_scales():
    for scale in (1e-4, 1e4):
        t, u, y, _ = fopdt_test(1.2, 20.0, 2.0, noise=0.01, rng=np.random.default_rng(1))
        r = identify(t * scale, u, y)
        assert r.time_constant == pytest.approx(20.0 * scale, rel=0.06)
        assert r.dead_time == pytest.approx(2.0 * scale, abs=scale)
        assert r.quality == "good", r.flags


# --- hard cases: flags, never exceptions ------------------------------------------------


def _quality(t, u, y):
    r = identify(t, u, y)
    assert isinstance(r, FitResult)
    return r


def test_hard_cases_are_rejected_or_suspect_with_reasons():
    rng = np.random.default_rng(3)
    t = np.arange(0.0, 300.0)
    u = np.where(t >= 50, 1.0, 0.0)
    # flat response
    r = _quality(t, u, np.full(t.size, 7.0))
    assert r.quality == "rejected" and "no_response" in r.flags and r.gain is None
    # response below noise
    r = _quality(t, u, simulate_fopdt(u, 1.0, 0.01, 10.0, 2.0) + rng.normal(0, 0.1, t.size))
    assert r.quality == "rejected" and "response_below_noise" in r.flags
    # step at the very end
    r = _quality(t, np.where(t >= 297, 1.0, 0.0), rng.normal(0, 0.01, t.size))
    assert r.quality == "rejected" and "step_at_end" in r.flags
    # dead time longer than the record
    y = simulate_fopdt(u, 1.0, 2.0, 10.0, 400.0) + rng.normal(0, 0.01, t.size)
    r = _quality(t, u, y)
    assert r.quality == "rejected"
    assert {"response_below_noise", "dead_time_beyond_record"} & set(r.flags)
    # time constant far below the sample period
    y = simulate_fopdt(u, 1.0, 2.0, 1e-3, 3.0) + rng.normal(0, 0.01, t.size)
    r = _quality(t, u, y)
    assert r.quality == "suspect" and "few_samples_per_time_constant" in r.flags
    assert r.dead_time == pytest.approx(3.0, abs=1.0)
    # time constant far beyond the record: integrating, or flagged
    y = simulate_fopdt(u, 1.0, 2.0, 1e5, 3.0) + rng.normal(0, 1e-4, t.size)
    r = _quality(t, u, y)
    assert (r.model == "integrating" and r.gain == pytest.approx(2.0 / 1e5, rel=0.05)) or (
        r.quality != "good"
    )
    # no input step, too short, non-finite
    assert "no_input_step" in _quality(t, np.ones(t.size), y).flags
    assert "too_few_samples" in _quality(t[:5], u[:5], y[:5]).flags
    bad = y.copy()
    bad[10] = np.nan
    assert "non_finite_samples" in _quality(t, u, bad).flags
    # step in the very first samples: no baseline
    r = _quality(t, np.where(t >= 1, 1.0, 0.0), y)
    assert r.quality == "rejected" and "no_baseline_before_step" in r.flags


def test_pulse_input_is_suspect_but_identified():
    rng = np.random.default_rng(4)
    t = np.arange(0.0, 400.0)
    u = np.where((t >= 50) & (t < 250), 1.0, 0.0)
    y = simulate_fopdt(u, 1.0, 2.0, 15.0, 4.0) + rng.normal(0, 0.02, t.size)
    r = identify(t, u, y)
    assert "multiple_input_moves" in r.flags and r.quality == "suspect"
    assert r.gain == pytest.approx(2.0, rel=0.03)  # output error on the measured input


# --- the result object ----------------------------------------------------------------------


def test_fit_result_is_frozen_and_serialises():
    t, u, y, _ = fopdt_test(2.0, 10.0, 3.0, noise=0.01, rng=np.random.default_rng(6))
    r = identify(t, u, y, input_range=(0, 100), output_range=(0, 200))
    with pytest.raises(dataclasses.FrozenInstanceError):
        r.gain = 3.0  # type: ignore[misc]
    row = r.to_row()
    assert ROW_KEYS <= set(row)
    assert isinstance(row["flags"], list) and row["settings"]["method"] == "least_squares"
    assert row["input_step"] == pytest.approx(10.0) and row["step_time"] == pytest.approx(20.0)
    assert row["y_before"] == pytest.approx(25.0, abs=0.2)  # noise sd 0.2
    assert row["y_after"] == pytest.approx(45.0, abs=0.2)
    assert r.gain_lo < r.gain < r.gain_hi and r.dead_time_lo <= r.dead_time <= r.dead_time_hi
    fitted = r.fitted(t, u)
    assert np.sqrt(np.mean((fitted - y) ** 2)) < 0.01 * 20 * 1.5
    none = identify(t, np.ones(t.size), y)
    assert none.model == "none" and np.all(np.isnan(none.fitted(t, u)))


def test_fitted_matches_analytic_step_response():
    t, u, y, _ = fopdt_test(1.5, 8.0, 2.5, T=0.25)
    r = identify(t, u, y)
    ref = 25.0 + step_response(t - 20.0, 1.5 * 10.0, 8.0, 2.5)
    np.testing.assert_allclose(r.fitted(t, u), ref, atol=1e-6)


def test_bad_arguments_raise_actionable_errors():
    t = np.arange(20.0)
    with pytest.raises(IdentificationError, match="unknown identification method"):
        identify(t, t, t, method="eyeball")
    with pytest.raises(DataError, match="one length"):
        identify(t, t[:-1], t)


def test_fit_result_round_trips_through_its_row():
    t, u, y, _ = fopdt_test(2.0, 10.0, 3.0, noise=0.01, rng=np.random.default_rng(3))
    r = identify(t, u, y)
    row = r.to_row()
    assert {"offset", "input_before", "start_state"} <= set(row)
    back = FitResult.from_row(row)
    assert back == r
    np.testing.assert_allclose(back.fitted(t, u), r.fitted(t, u))
    with pytest.raises(TypeError):  # wide record: no positional construction
        FitResult("fopdt", "least_squares", 1.0)  # type: ignore[misc]


def test_fit_result_fields_are_the_registered_fit_columns():
    from mapper.columns import FIT_LIST_NAMES, FIT_VALUE_NAMES

    fields = {f.name for f in dataclasses.fields(FitResult)}
    assert set(FIT_VALUE_NAMES) | set(FIT_LIST_NAMES) | {"settings"} == fields
