"""Closed-loop simulation (mapper.analysis.closedloop) against python-control's time responses.

The reference loop uses a 10th-order Padé approximation of the dead time in state-space form and
python-control's ``step_response`` on a fine time grid; the IAE is the trapezoidal integral of |error|.
"""

from __future__ import annotations

import control
import numpy as np
import pytest

from mapper.analysis.closedloop import sample_period, simulate_loops
from mapper.analysis.tuning import simc_pi


def reference_loop(kc, ti, gain, time_constant, dead_time, *, setpoint=False, integrating=False):
    """IAE, peak and overshoot of the continuous loop by python-control (Padé order 10, state space)."""
    s = control.tf("s")
    num, den = control.pade(dead_time, 10)
    delay = control.ss(control.tf(num, den))
    lag = control.ss(gain / s) if integrating else control.ss(gain / (time_constant * s + 1))
    plant = lag * delay
    controller = control.ss(kc * (1 + 1 / (ti * s)))
    horizon = 40 * (dead_time + ti + (0 if integrating else time_constant))
    t = np.linspace(0.0, horizon, 8001)
    loop = control.feedback(controller * plant, 1) if setpoint else control.feedback(plant, controller)
    _, y = control.step_response(loop, t)
    error = 1 - y if setpoint else y
    return float(np.trapezoid(np.abs(error), t)), float(np.max(np.abs(y))), float(max(np.max(y) - 1, 0.0))


LOOPS = [  # (gain, time constant, dead time): lag-dominant, balanced, delay-dominant
    (2.0, 10.0, 1.0),
    (1.0, 100.0, 2.0),
    (3.0, 5.0, 5.0),
    (1.0, 1.0, 10.0),
]


@pytest.mark.parametrize("gain,time_constant,dead_time", LOOPS)
def test_iae_ratios_match_python_control(gain, time_constant, dead_time):
    local = simc_pi(gain, time_constant, dead_time)
    candidates = [(0.6 * local.kc, 1.5 * local.ti), (1.25 * local.kc, 0.8 * local.ti), (0.5 * local.kc, local.ti)]
    period = sample_period(dead_time, dead_time)
    kc = np.array([local.kc] + [c[0] for c in candidates])
    ti = np.array([local.ti] + [c[1] for c in candidates])
    ours = simulate_loops(kc, ti, gain, time_constant, dead_time, period)
    assert ours.settled.all()
    reference = [reference_loop(k, t, gain, time_constant, dead_time) for k, t in zip(kc, ti)]
    for i in range(1, len(kc)):
        expected = reference[i][0] / reference[0][0]
        assert ours.iae[i] / ours.iae[0] == pytest.approx(expected, rel=0.05)
        assert ours.peak[i] / ours.peak[0] == pytest.approx(reference[i][1] / reference[0][1], rel=0.05)
    # Absolute IAE too, where the Padé reference is good (its ripple spoils it when delay dominates).
    if time_constant >= dead_time:
        assert ours.iae == pytest.approx([r[0] for r in reference], rel=0.01)


def test_setpoint_overshoot_and_iae_match_python_control():
    gain, time_constant, dead_time = 1.0, 100.0, 2.0
    local = simc_pi(gain, time_constant, dead_time)
    ours = simulate_loops(local.kc, local.ti, gain, time_constant, dead_time, sample_period(dead_time, dead_time),
                          setpoint=True)
    iae, _, overshoot = reference_loop(local.kc, local.ti, gain, time_constant, dead_time, setpoint=True)
    assert ours.iae[0] == pytest.approx(iae, rel=0.03)
    assert ours.overshoot[0] == pytest.approx(overshoot, abs=0.02)


def test_integrating_loop_matches_python_control():
    gain, dead_time = 0.05, 4.0
    local = simc_pi(gain, None, dead_time, model="integrating")
    kc = np.array([local.kc, 0.7 * local.kc])
    ti = np.array([local.ti, 1.4 * local.ti])
    ours = simulate_loops(kc, ti, gain, np.nan, dead_time, sample_period(dead_time, dead_time), integrating=True)
    reference = [reference_loop(k, t, gain, None, dead_time, integrating=True)[0] for k, t in zip(kc, ti)]
    assert ours.iae == pytest.approx(reference, rel=0.02)


def test_integrated_error_of_a_monotone_response_is_ti_over_kc():
    # IE after a unit load step = ti / kc (Åström & Hägglund, PID Controllers, 1995); a well-damped,
    # detuned loop does not cross zero, so IAE = IE.
    ours = simulate_loops(1.0, 12.0, 2.0, 10.0, 1.0, 0.1)
    assert ours.iae[0] == pytest.approx(12.0, rel=1e-3)


def test_unstable_loop_is_not_settled():
    ours = simulate_loops(50.0, 1.0, 2.0, 10.0, 1.0, 0.1, max_steps=4096)
    assert not ours.settled[0]


def test_keep_returns_the_sampled_response():
    ours = simulate_loops([2.5, 1.5], [8.0, 12.0], 2.0, 10.0, 1.0, 0.1, keep=True)
    assert len(ours.outputs) == 2 and len(ours.times[0]) == len(ours.outputs[0])
    assert np.max(np.abs(ours.outputs[0])) == pytest.approx(ours.peak[0])
    # Nothing moves before the dead time has passed.
    early = ours.times[0] < 1.0 - 0.1
    assert np.all(ours.outputs[0][early] == 0.0)
