"""Response maths: exact ZOH discretisation, sensitivities, integrating and step responses."""

from __future__ import annotations

import math
import subprocess
import sys

import numpy as np
import pytest
from scipy import signal

from mapper.identification.models import (
    first_order_filter,
    fopdt_sensitivities,
    simulate_fopdt,
    simulate_integrating,
    split_dead_time,
    step_response,
    zoh_coefficients,
)


def test_zoh_coefficients_check_value():
    # Check value from the design brief, derived from the analytic step response:
    # K=2, tau=5, theta=2.4, T=1 -> a=0.818731, b1=0.226159, b2=0.136379, d=2
    a, b1, b2, d = zoh_coefficients(2.0, 5.0, 2.4, 1.0)
    assert d == 2
    assert a == pytest.approx(0.818731, abs=1e-6)
    assert b1 == pytest.approx(0.226159, abs=1e-6)
    assert b2 == pytest.approx(0.136379, abs=1e-6)
    # exact formulas: a = exp(-T/tau), b1 + b2 = K (1 - a) (steady-state gain preserved)
    assert b1 + b2 == pytest.approx(2.0 * (1.0 - math.exp(-0.2)), rel=1e-12)


def test_zoh_matches_scipy_cont2discrete_without_fraction():
    # Reference: scipy.signal.cont2discrete, zero-order hold, of K/(tau s + 1)
    K, tau, T = 1.7, 3.3, 0.4
    num, den, _ = signal.cont2discrete(([K], [tau, 1.0]), T, method="zoh")
    a_ref = -den[1]
    b_ref = np.ravel(num)[-1]
    a, b1, b2, d = zoh_coefficients(K, tau, 0.0, T)
    assert (a, d) == (pytest.approx(a_ref, rel=1e-12), 0)
    assert b1 == pytest.approx(b_ref, rel=1e-12)
    assert b2 == pytest.approx(0.0, abs=1e-15)
    # whole-sample dead time: same coefficients, delay in samples
    a2, b12, b22, d2 = zoh_coefficients(K, tau, 3 * T, T)
    assert d2 == 3 and b12 == pytest.approx(b_ref, rel=1e-9) and abs(b22) < 1e-9


@pytest.mark.parametrize("dead_time", [0.0, 0.35, 1.0, 2.4, 7.77])
def test_step_matches_sampled_analytic_curve(dead_time):
    # Reference: the analytic FOPDT step response K(1 - exp(-(t - theta)/tau)) sampled
    T = 0.5
    t = np.arange(0.0, 60.0, T)
    u = (t >= 5.0).astype(float)
    y = simulate_fopdt(u, T, 2.0, 5.0, dead_time)
    ref = step_response(t - 5.0, 2.0, 5.0, dead_time)
    np.testing.assert_allclose(y, ref, atol=1e-12)


def test_arbitrary_input_matches_lsim_on_a_fine_grid():
    # Reference: scipy.signal.lsim of K/(tau s + 1) driven by the held, delayed input
    # on a grid 200 times finer, with lsim's own zero-order hold (interp=False).
    rng = np.random.default_rng(3)
    T, K, tau, theta = 1.0, 1.5, 4.0, 2.3
    u = np.repeat(rng.normal(size=12), 5)
    u[0] = 0.0
    y = simulate_fopdt(u, T, K, tau, theta, u0=0.0)
    fine = 200
    tf = np.arange(u.size * fine) * (T / fine)
    held = np.repeat(u, fine)
    shift = int(round(theta / T * fine))
    delayed = np.concatenate([np.zeros(shift), held[: held.size - shift]])
    _, yf, _ = signal.lsim(([K], [tau, 1.0]), delayed, tf, interp=False)
    np.testing.assert_allclose(y, yf[::fine], atol=1e-9)


def test_63_percent_point_one_time_constant_after_response_starts():
    # Common practice in the trade: 63.2 % of the change one time constant after the
    # response starts.
    K, tau, theta = 3.0, 8.0, 2.0
    assert step_response(np.array([theta + tau]), K, tau, theta)[0] == pytest.approx(
        K * (1 - math.exp(-1)), rel=1e-12
    )
    assert 1 - math.exp(-1) == pytest.approx(0.632, abs=5e-4)
    assert step_response(np.array([theta - 1e-9]), K, tau, theta)[0] == 0.0


@pytest.mark.parametrize("dead_time", [0.0, 1.3, 3.0, 4.49])
def test_sensitivities_match_finite_differences(dead_time):
    rng = np.random.default_rng(7)
    T = 0.5
    u = np.concatenate([np.zeros(10), np.cumsum(rng.normal(size=150)) * 0.1])
    K, tau = 2.0, 6.0
    S = fopdt_sensitivities(u, T, K, tau, dead_time)
    h = 1e-6

    def sim(gain, time_constant, dead):
        return simulate_fopdt(u, T, gain, time_constant, dead)

    ref = np.column_stack(
        [
            (sim(K + h, tau, dead_time) - sim(K - h, tau, dead_time)) / (2 * h),
            (sim(K, tau + h, dead_time) - sim(K, tau - h, dead_time)) / (2 * h),
            # one-sided: the analytic dead-time derivative is the right-hand one
            (sim(K, tau, dead_time + h) - sim(K, tau, dead_time)) / h,
        ]
    )
    np.testing.assert_allclose(S, ref, atol=2e-5 * np.abs(ref).max())


def test_integrating_response_is_a_delayed_ramp():
    # Reference: dy/dt = k' (u(t - theta) - u0) integrates to k' * step * (t - t0 - theta)
    T, k, theta = 0.25, 0.3, 1.1
    t = np.arange(0.0, 20.0, T)
    u = np.where(t >= 2.0, 4.0, 1.0)
    y = simulate_integrating(u, T, k, theta, y0=10.0)
    ref = 10.0 + k * 3.0 * np.clip(t - 2.0 - theta, 0.0, None)
    np.testing.assert_allclose(y, ref, atol=1e-12)


def test_u0_and_y0_convention():
    u = np.array([1.0, 1.0, 3.0, 3.0, 3.0])
    y = simulate_fopdt(u, 1.0, 2.0, 1e-9, 0.0, y0=5.0)
    # tiny lag: output follows 5 + 2*(u - u[0]) one sample later (ZOH)
    np.testing.assert_allclose(y, [5.0, 5.0, 5.0, 9.0, 9.0], atol=1e-9)


def test_split_dead_time_and_bad_arguments():
    assert split_dead_time(2.4, 1.0) == (2, pytest.approx(0.4))
    assert split_dead_time(3.0, 0.5) == (6, 0.0)
    with pytest.raises(ValueError):
        zoh_coefficients(1.0, 0.0, 1.0, 1.0)
    with pytest.raises(ValueError):
        simulate_fopdt(np.ones(5), 1.0, 1.0, 1.0, -1.0)


# --- the own zero-order-hold filter against scipy (issue 17) ------------------------------


@pytest.mark.parametrize("n", [1, 2, 7, 40, 600, 5000])
def test_first_order_filter_matches_scipy_lfilter(n):
    # reference: scipy.signal.lfilter([1], [1, -a], x), the textbook direct-form recursion
    rng = np.random.default_rng(n)
    x = rng.normal(size=n) * 10.0 ** rng.uniform(-3, 3)
    for a in (0.0, 1e-30, 0.001, 0.05, 0.0869, 0.087, 0.3, math.exp(-1 / 40), 0.999, 0.999999, 1.0):
        ref = signal.lfilter([1.0], [1.0, -a], x)
        got = first_order_filter(x, a)
        scale = max(float(np.max(np.abs(ref))), 1e-300)
        assert np.max(np.abs(got - ref)) <= 1e-11 * scale, (n, a)
    rows = rng.normal(size=(3, n))
    np.testing.assert_allclose(first_order_filter(rows, 0.7), signal.lfilter([1.0], [1.0, -0.7], rows, axis=1),
                               rtol=1e-11, atol=1e-12)
    with pytest.raises(ValueError):
        first_order_filter(x, 1.5)


@pytest.mark.parametrize("dead_time", [0.0, 0.3, 2.0, 7.6])
def test_fopdt_response_matches_the_delayed_zoh_transfer_function_in_scipy(dead_time):
    # y[k+1] = a y[k] + b1 u[k-d] + b2 u[k-d-1]: numerator z^-(d+1) (b1 + b2 z^-1) over
    # (1 - a z^-1), filtered by scipy.signal.lfilter; a and b1 (no fraction) also from
    # scipy.signal.cont2discrete of K/(tau s + 1) with ZOH
    T, K, tau = 0.5, 1.7, 6.0
    rng = np.random.default_rng(4)
    u = np.cumsum(rng.normal(size=400))
    a, b1, b2, d = zoh_coefficients(K, tau, dead_time, T)
    numerator = np.zeros(d + 3)
    numerator[d + 1], numerator[d + 2] = b1, b2
    ref = signal.lfilter(numerator, [1.0, -a], u - u[0])
    np.testing.assert_allclose(simulate_fopdt(u, T, K, tau, dead_time), ref, rtol=1e-10, atol=1e-10)
    num, den, _ = signal.cont2discrete(([K], [tau, 1.0]), T, method="zoh")
    assert a == pytest.approx(-den[1], rel=1e-12)
    if dead_time == 0.0:
        assert b1 == pytest.approx(num[0][-1], rel=1e-12) and b2 == 0.0
    ramp = signal.lfilter([0.0, T], [1.0, -1.0], u - u[0])  # exact ZOH integrator
    np.testing.assert_allclose(simulate_integrating(u, T, 1.0, 0.0), ramp, rtol=1e-10, atol=1e-9)


def test_fitting_does_not_import_scipy_signal():
    # issue 17: importing scipy.signal costs most of a second per process
    code = (
        "import sys, numpy as np\n"
        "from mapper.identification.fitting import fit_one\n"
        "t = np.arange(300.0); u = 40 + 10 * (t >= 50)\n"
        "y = 25 + 2 * 10 * (1 - np.exp(-np.clip(t - 53, 0, None) / 30))\n"
        "row = fit_one((1, t, u, y, None, None, 'least_squares'))\n"
        "assert row['model'] == 'fopdt'\n"
        "print('scipy.signal' in sys.modules)\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"
