"""Intervals under slow disturbances, and the noise-model algebra they rest on.

Seeded simulations of one linear FOPDT plant (scipy's lfilter for the noise); the coverage
targets come from the product brief (issue 14: at least 85 % coverage of the true gain and
time constant under slow wander, for 30 step tests, half up and half down).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.signal import lfilter

from mapper.identification.flags import FLAGS
from mapper.identification.identify import identify
from mapper.identification.models import simulate_fopdt
from mapper.identification.uncertainty import (
    _ar1_times,
    _grid_likelihood_terms,
    disturbance_covariance,
)

GAIN, TIME_CONSTANT, DEAD_TIME, PERIOD = 2.0, 40.0, 8.0, 1.0
SAMPLES = 400
RESPONSE = abs(GAIN * 5.0)


def _wander_campaign(kind: str, seed: int, tests: int = 30):
    """30 step tests of one FOPDT, half up and half down, white noise 1 % of the response
    plus a slow wander of about 3 % of the response (invented scenario)."""
    rng = np.random.default_rng(seed)
    t = np.arange(SAMPLES) * PERIOD
    for i in range(tests):
        u = 50.0 + (5.0 if i % 2 == 0 else -5.0) * (t >= 60.0)
        if kind == "slow_ar1":  # correlation time 300 samples, marginal sd 3 % of the response
            a = math.exp(-1.0 / 300.0)
            sd = 0.03 * RESPONSE
            wander = lfilter([1.0], [1.0, -a], rng.normal(0.0, sd * math.sqrt(1 - a * a), SAMPLES),
                             zi=[a * rng.normal(0.0, sd)])[0]  # fmt: skip
        else:  # random walk whose spread at the end of the record is 3 % of the response
            wander = np.cumsum(rng.normal(0.0, 0.03 * RESPONSE / math.sqrt(SAMPLES), SAMPLES))
        white = rng.normal(0.0, 0.01 * RESPONSE, SAMPLES)
        yield t, u, 20.0 + simulate_fopdt(u, PERIOD, GAIN, TIME_CONSTANT, DEAD_TIME) + wander + white


@pytest.mark.parametrize("kind, seed", [("slow_ar1", 14), ("random_walk", 41)])
def test_intervals_cover_the_truth_under_slow_wander(kind, seed):
    # Issue 14 target: coverage >= 85 % for gain and time constant (before the disturbance
    # model the same scenario gave about 20 % for the gain).
    inside = {"gain": 0, "time_constant": 0}
    truth = {"gain": GAIN, "time_constant": TIME_CONSTANT}
    results = [identify(t, u, y) for t, u, y in _wander_campaign(kind, seed)]
    for r in results:
        for key, true in truth.items():
            inside[key] += getattr(r, key + "_lo") <= true <= getattr(r, key + "_hi")
    assert inside["gain"] >= 0.85 * len(results), inside
    assert inside["time_constant"] >= 0.85 * len(results), inside
    # a wander of 3 % is not a load change (issue 14: disturbed tests flagged, not every test)
    assert not any("load_change" in r.flags for r in results)


def test_ar1_product_matches_the_correlation_matrix():
    # R[i, j] = a^|i-j|, the AR(1) correlation matrix (e.g. Box & Jenkins 1970), built densely
    a, n = 0.83, 12
    R = a ** np.abs(np.subtract.outer(np.arange(n), np.arange(n)))
    x = np.random.default_rng(0).normal(size=(n, 3))
    assert np.allclose(_ar1_times(x, a, axis=0), R @ x)


def test_white_residuals_give_the_textbook_covariance():
    # With white residuals the model average leans on the white model, so the slope's
    # variance stays near s^2 (J'J)^-1 (Seber & Wild 1989, computed here with numpy): at
    # least that, and its sd within the brief's 2.5x of the white-noise width. (The offset
    # is not reported and is widened most: a slow wander looks like a level change.)
    rng = np.random.default_rng(7)
    n = 300
    x = np.linspace(0.0, 1.0, n)
    J = np.column_stack([np.ones(n), 1.0 - np.exp(-5.0 * x)])
    r = rng.normal(0.0, 0.1, n)
    r -= J @ np.linalg.lstsq(J, r, rcond=None)[0]  # residuals orthogonal to the columns
    textbook = (r @ r) / (n - 2) * np.linalg.inv(J.T @ J)
    d = disturbance_covariance(J, r)
    ratio = np.sqrt(np.diag(d.covariance) / np.diag(textbook))
    assert 0.99 <= ratio[1] <= 2.5, ratio
    assert d.correlated_sd < 0.5 * d.white_sd


def test_wander_is_found_and_widens_the_gain_interval():
    # A random walk of 3 % of the response on 1 % white noise: the fitted model gives the
    # correlated part most of the spread, and the gain interval is wider than white-noise
    # algebra would make it.
    t, u, y = next(_wander_campaign("random_walk", 5, tests=1))
    r = identify(t, u, y)
    white_only = identify(t, u, simulate_fopdt(u, PERIOD, GAIN, TIME_CONSTANT, DEAD_TIME) + 20.0
                          + np.random.default_rng(5).normal(0.0, 0.01 * RESPONSE, SAMPLES))  # fmt: skip
    assert (r.gain_hi - r.gain_lo) > 2.0 * (white_only.gain_hi - white_only.gain_lo)


def _pump_start(load: float, seed: int = 3):
    """Invented drum-level-like test: K=0.109, tau=318 s, theta=30 s, T=5 s, input step 3.2 at
    300 s (response 0.35), and a load step of ``load`` entering through the same lag at 900 s,
    mid-response."""
    rng = np.random.default_rng(seed)
    t = np.arange(0.0, 3000.0, 5.0)
    u = 40.0 + 3.2 * (t >= 300.0)
    disturbance = load * (t >= 900.0)
    y = (50.0 + simulate_fopdt(u, 5.0, 0.109, 318.0, 30.0) + simulate_fopdt(disturbance, 5.0, 1.0, 318.0, 0.0)
         + rng.normal(0.0, 0.005, t.size))  # fmt: skip
    return t, u, y


def test_load_step_during_the_response_is_flagged():
    # Issue 14: a test hit by a load step mid-response fitted gain and time constant far from
    # the truth with only `not_settled`; it must be flagged and graded suspect.
    clean = identify(*_pump_start(0.0))
    assert clean.quality == "good" and clean.gain == pytest.approx(0.109, rel=0.02), clean.flags
    hit = identify(*_pump_start(0.2))  # 57 % of the response
    assert hit.gain > 0.15  # the fit is dragged (truth 0.109), which is why the flag matters
    assert "load_change" in hit.flags and hit.quality == "suspect"
    assert any("baseline moved by about" in note for note in hit.notes)


def test_disturbance_flags_are_registered_with_text_and_effect():
    for name in ("load_change", "slow_disturbance"):
        assert FLAGS[name].effect == "suspect" and FLAGS[name].text.endswith(".")


@pytest.mark.parametrize("n", [60, 601])
def test_grid_terms_match_dense_algebra(n):
    """The sine-basis grid terms give z'H^-1 z, log det H and z'Rz of dense linear algebra.

    Reference: numpy's dense solve and slogdet on ``H = (1 - w) I + w R``,
    ``R[i, j] = a^|i-j|`` built entry by entry, for short and very long correlation
    times (the poles span 1 sample to 10 records, as the covariance uses them; 601 + 1 is
    twice a prime, the slow path of the sine transform).
    """
    rng = np.random.default_rng(7)
    shares = (0.0, 0.02, 0.6, 0.98, 1.0)
    poles = np.exp(-1.0 / np.geomspace(1.0, 10.0 * n, 4))
    z = rng.normal(size=(n, 4))
    grams, log_dets, correlated = _grid_likelihood_terms(z, poles, shares)
    assert grams.shape == (4, len(shares), 4, 4) and correlated.shape == (4, 4, 4)
    lags = np.abs(np.subtract.outer(np.arange(n), np.arange(n)))
    for j, a in enumerate(poles):
        R = a**lags
        for k, w in enumerate(shares):
            H = (1.0 - w) * np.eye(n) + w * R
            expected = z.T @ np.linalg.solve(H, z)
            np.testing.assert_allclose(grams[j, k], expected, rtol=1e-8, atol=1e-8 * np.abs(expected).max())
            assert log_dets[j, k] == pytest.approx(np.linalg.slogdet(H)[1], abs=1e-8)
        np.testing.assert_allclose(correlated[j], z.T @ R @ z, rtol=1e-8, atol=1e-8 * np.abs(z.T @ R @ z).max())


def test_covariance_leaves_the_callers_jacobian_alone():
    """A Fortran-ordered Jacobian (as the fits return it) is not rescaled in place."""
    rng = np.random.default_rng(3)
    jacobian = np.asfortranarray(rng.normal(size=(80, 3)))
    jacobian[:, 0] = 1.0
    given = jacobian.copy()
    disturbance_covariance(jacobian, rng.normal(size=80))
    assert np.array_equal(jacobian, given)
