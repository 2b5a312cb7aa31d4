"""Tests of mapper.analysis.tuning: PI rules, settings, exact-frequency-response margins, slowdown."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import signal

from mapper.errors import DataError
from mapper.analysis.margins import frequency_margins, loop_margins, quick_peak_sensitivity, search_grid
from mapper.analysis.tuning import PITuning, dimensionless_gain, lambda_pi, simc_pi, slowdown, tune


# --- tuning rules -------------------------------------------------------------------------------

def test_simc_fopdt_reference_values():
    # Design brief check value: K=2, tau=10, theta=2 -> Kc=1.25, Ti=10 (SIMC, Skogestad 2003).
    t = simc_pi(2.0, 10.0, 2.0)
    assert t.kc == pytest.approx(1.25, rel=1e-12)
    assert t.ti == pytest.approx(10.0, rel=1e-12)
    assert t.closed_loop_time == 2.0 and t.rule == "simc"
    # Skogestad (2003) example E1, k=1, tau=2.5, theta=1.47 -> Kc=0.850, Ti=2.5 (from memory of the paper).
    e1 = simc_pi(1.0, 2.5, 1.47)
    assert e1.kc == pytest.approx(0.850, abs=5e-4)
    assert e1.ti == pytest.approx(2.5, rel=1e-12)


def test_simc_lag_dominant_uses_four_times_closed_loop_time():
    # SIMC rule Ti = min(tau, 4 (tau_c + theta)) (Skogestad 2003): tau=100, theta=1 -> Ti = 8.
    t = simc_pi(2.0, 100.0, 1.0)
    assert t.ti == pytest.approx(8.0)
    assert t.kc == pytest.approx(100.0 / (2.0 * 2.0))


def test_simc_integrating_and_user_closed_loop_time():
    # SIMC integrating rule (Skogestad 2003): Kc = 1/(k'(tau_c+theta)), Ti = 4(tau_c+theta).
    t = simc_pi(0.5, None, 2.0, model="integrating")
    assert t.kc == pytest.approx(1.0 / (0.5 * 4.0))
    assert t.ti == pytest.approx(16.0)
    slow = simc_pi(0.5, None, 2.0, model="integrating", closed_loop_time=6.0)
    assert slow.kc == pytest.approx(1.0 / (0.5 * 8.0))
    assert slow.ti == pytest.approx(32.0)
    # Negative process gain gives a negative (direct-acting) controller gain.
    neg = simc_pi(-2.0, 10.0, 2.0)
    assert neg.kc == pytest.approx(-1.25)
    assert neg.settings()["action"] == "direct"


def test_lambda_rules():
    # Lambda / IMC PI (Rivera, Morari & Skogestad 1986; Chien & Fruehauf 1990): Kc = tau/(K(lambda+theta)), Ti=tau.
    t = lambda_pi(2.0, 10.0, 2.0, closed_loop_time=8.0)
    assert t.kc == pytest.approx(10.0 / (2.0 * 10.0))
    assert t.ti == pytest.approx(10.0)
    # Integrating form (Chien & Fruehauf 1990, from memory): Kc=(2 lam+theta)/(k'(lam+theta)^2), Ti=2 lam+theta.
    i = lambda_pi(0.5, None, 2.0, closed_loop_time=6.0, model="integrating")
    assert i.kc == pytest.approx(14.0 / (0.5 * 64.0))
    assert i.ti == pytest.approx(14.0)
    assert tune("lambda", 2.0, 10.0, 2.0, closed_loop_time=8.0) == t
    with pytest.raises(DataError):
        tune("fastest", 2.0, 10.0, 2.0)


def test_bad_process_raises_data_error():
    with pytest.raises(DataError):
        simc_pi(0.0, 10.0, 1.0)
    with pytest.raises(DataError):
        simc_pi(1.0, -10.0, 1.0)
    with pytest.raises(DataError, match="closed_loop_time"):
        simc_pi(1.0, 10.0, 0.0)
    # With a closed-loop time the zero dead time is fine: Kc = tau/(K tau_c).
    assert simc_pi(1.0, 10.0, 0.0, closed_loop_time=5.0).kc == pytest.approx(2.0)


def test_settings_in_engineer_forms():
    # Proportional band = 100 / Kc(dimensionless) % (common practice); Kc(%/%) = Kc * output span / input span.
    t = PITuning(kc=1.25, ti=90.0, rule="simc")
    s = t.settings(input_range=[0, 100], output_range=[0, 200])
    assert s["kc_dimensionless"] == pytest.approx(2.5)
    assert s["proportional_band"] == pytest.approx(40.0)
    assert s["ti_min"] == pytest.approx(1.5)
    assert s["action"] == "reverse"
    assert "proportional_band" not in t.settings()
    assert dimensionless_gain(1.0, input_range=[0, 100]) is None
    with pytest.raises(DataError):
        dimensionless_gain(1.0, input_range=[5, 5], output_range=[0, 1])


# --- margins ------------------------------------------------------------------------------------

@pytest.mark.parametrize("ratio", [0.5, 1.0, 4.0, 8.0])
def test_simc_loop_margins_analytic(ratio):
    # SIMC with tau_c=theta, tau <= 8 theta gives L = exp(-theta s)/(2 theta s):
    # GM = pi, PM = 90 - 28.65 = 61.4 deg, Ms = 1.59 (analytic; design brief).
    theta = 1.7
    tau = ratio * theta
    t = simc_pi(3.0, tau, theta)
    m = loop_margins(t.kc, t.ti, 3.0, tau, theta)
    assert m.stable
    assert m.gain_margin == pytest.approx(math.pi, rel=1e-6)
    assert m.phase_margin_deg == pytest.approx(90.0 - math.degrees(0.5), abs=1e-4)
    assert m.ms == pytest.approx(1.59, abs=0.005)
    assert m.gain_crossover == pytest.approx(1.0 / (2 * theta), rel=1e-6)
    assert m.phase_crossover == pytest.approx(math.pi / (2 * theta), rel=1e-6)


def test_integrating_limit_margins():
    # SIMC on k' exp(-theta s)/s: GM 2.96, PM 46.9 deg, Ms 1.70 (Skogestad 2003, recomputed).
    t = simc_pi(0.2, None, 3.0, model="integrating")
    m = loop_margins(t.kc, t.ti, 0.2, None, 3.0, model="integrating")
    assert m.gain_margin == pytest.approx(2.96, abs=0.005)
    assert m.phase_margin_deg == pytest.approx(46.9, abs=0.05)
    assert m.ms == pytest.approx(1.70, abs=0.005)


def test_unstable_loop_is_reported_not_hidden():
    # L = m exp(-s)/(2 s) has gain margin pi/m exactly (analytic); m=4 > pi is unstable.
    t = simc_pi(1.0, 1.0, 1.0)
    m = loop_margins(4.0 * t.kc, t.ti, 1.0, 1.0, 1.0)
    assert m.gain_margin == pytest.approx(math.pi / 4.0, rel=1e-6)
    assert not m.stable and math.isinf(m.ms) and "closed_loop_unstable" in m.flags
    w = search_grid(1.0, 1.0, 1.0, t.ti)
    assert math.isinf(quick_peak_sensitivity(4.0 * t.kc, t.ti, 1.0, 1.0, 1.0, w))
    # Wrong controller action is never stable.
    assert not loop_margins(-t.kc, t.ti, 1.0, 1.0, 1.0).stable
    # Integrating process with ti below the dead time: phase starts below -180 deg, unstable.
    assert not loop_margins(1.0, 0.5, 0.1, None, 1.0, model="integrating").stable


def test_margins_match_python_control_on_rational_loops():
    control = pytest.importorskip("control")
    s = control.tf("s")
    # Third-order rational loop, no dead time: reference values from python-control.
    kc, ti = 2.0, 3.0
    loop = kc * (1 + 1 / (ti * s)) / (s + 1) ** 3
    gm, pm, sm, wpc, wgc, _ = control.stability_margins(loop)

    def response(w):
        return kc * (1 + 1 / (ti * 1j * w)) / (1j * w + 1) ** 3

    m = frequency_margins(response, w=np.logspace(-4, 3, 2000))
    assert m.gain_margin == pytest.approx(gm, rel=1e-6)
    assert m.phase_margin_deg == pytest.approx(pm, rel=1e-6)
    assert m.ms == pytest.approx(1.0 / sm, rel=1e-6)
    assert m.phase_crossover == pytest.approx(wpc, rel=1e-5)
    assert m.gain_crossover == pytest.approx(wgc, rel=1e-5)
    # FOPDT loop with theta = 0 through loop_margins (PI zero not cancelling the lag): python-control reference.
    K, tau = 2.0, 10.0
    for kc, ti in ((1.0, 1.0), (3.0, 2.0)):
        ref = control.stability_margins(kc * (1 + 1 / (ti * s)) * K / (tau * s + 1))
        mine = loop_margins(kc, ti, K, tau, 0.0)
        assert math.isinf(mine.gain_margin) and math.isinf(ref[0])
        assert mine.phase_margin_deg == pytest.approx(ref[1], rel=1e-6)
        assert mine.ms == pytest.approx(1.0 / ref[2], rel=1e-6)


def test_ms_bounds_on_random_loops():
    # GM >= Ms/(Ms-1) and PM >= 2 arcsin(1/(2 Ms)) (Åström & Hägglund) on many stable random loops.
    rng = np.random.default_rng(7)
    checked = 0
    for _ in range(150):
        integrating = rng.random() < 0.3
        gain = float(rng.uniform(0.1, 10.0)) * (1 if rng.random() < 0.8 else -1)
        theta = float(rng.uniform(0.05, 5.0))
        tau = None if integrating else float(theta * 10 ** rng.uniform(-1, 2))
        base = simc_pi(gain, tau, theta, model="integrating" if integrating else "fopdt")
        kc = base.kc * 10 ** rng.uniform(-0.7, 0.4)
        ti = base.ti * 10 ** rng.uniform(-0.3, 0.7)
        m = loop_margins(kc, ti, gain, tau, theta, model="integrating" if integrating else "fopdt")
        if not m.stable:
            continue
        checked += 1
        assert m.gain_margin >= m.ms / (m.ms - 1) * (1 - 1e-6)
        assert m.phase_margin_deg >= math.degrees(2 * math.asin(1 / (2 * m.ms))) - 1e-6
        w = search_grid(gain, tau, theta, ti, model="integrating" if integrating else "fopdt")
        quick = quick_peak_sensitivity(kc, ti, gain, tau, theta, w, model="integrating" if integrating else "fopdt")
        assert quick == pytest.approx(m.ms, rel=2e-3)
    assert checked > 80


def test_slowdown_is_ratio_of_integrated_errors():
    # IE after a unit load step = Ti/Kc (Åström & Hägglund 1995); cross-checked by scipy.signal.lsim on
    # the closed loop d -> e = -G/(1+CG) of a first-order process (no dead time).
    K, tau = 2.0, 10.0
    local = PITuning(kc=2.0, ti=5.0)
    given = PITuning(kc=1.0, ti=8.0)
    t = np.linspace(0, 400, 40001)

    def integrated_error(c):
        # -K Ti s / (tau Ti s^2 + Ti (1 + K Kc) s + K Kc)
        sys = signal.lti([-K * c.ti, 0.0], [tau * c.ti, c.ti * (1 + K * c.kc), K * c.kc])
        _, e, _ = signal.lsim(sys, np.ones_like(t), t)
        return float(np.trapezoid(e, t))

    assert integrated_error(local) == pytest.approx(-local.ti / local.kc, rel=1e-3)
    expected = integrated_error(given) / integrated_error(local)
    assert slowdown(local, given) == pytest.approx(expected, rel=1e-3)
    assert slowdown(local, given) == pytest.approx(3.2)
