"""Step-test campaigns on a gravity-drained tank simulated with scipy.integrate.solve_ivp.

A dh/dt = q(t - delay) + d(t) - c sqrt(h): the linearisation at level h gives K = 2 sqrt(h)/c and
tau = 2 A sqrt(h)/c (textbook linearisation, e.g. Seborg et al.; from memory). A step in q that moves
the level from h0 to h1 has a secant gain equal, to second order, to K at the mean level (h0 + h1)/2,
which is the operating level mapper gives the test; so the truth at a test's level is 2 sqrt(level)/c.
Each test is identified with :func:`mapper.identification.identify.identify` and becomes one row of
``test_params``.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
from scipy.integrate import solve_ivp

from mapper.identification.identify import identify

AREA, OUTFLOW, DELAY = 10.0, 1.0, 2.0  # tank area, outflow coefficient c, transport delay (s)


def true_gain(level: float, c: float = OUTFLOW) -> float:
    return 2.0 * math.sqrt(level) / c


def simulate_step(level, direction, *, step_fraction=0.02, load=None, wander=None, noise=0.01, seed=0,
                  period=1.0, duration=400.0, step_time=30.0, area=AREA, c=OUTFLOW):
    """One open-loop step test around ``level``: arrays t, q, h.

    ``load=(time, size)`` adds a step of ``size`` (a fraction of the inflow) to the tank at ``time``;
    ``wander=(sd, correlation_samples)`` adds a slow AR(1) inflow disturbance of that standard
    deviation (fraction of the inflow). White measurement noise has sd ``noise`` times the response.
    """
    rng = np.random.default_rng(seed)
    sign = 1.0 if direction == "up" else -1.0
    dq = step_fraction * c * math.sqrt(level)
    # start where the step ends up at `level` on average: h0 below (up) or above (down) by half the move
    q_mid = c * math.sqrt(level)
    q0, q1 = q_mid - sign * dq / 2, q_mid + sign * dq / 2
    h0 = (q0 / c) ** 2
    t = np.arange(0.0, duration, period)
    disturbance = np.zeros_like(t)
    if wander is not None:
        sd, samples = wander
        phi = math.exp(-1.0 / samples)
        e = rng.standard_normal(t.size) * sd * q_mid * math.sqrt(1 - phi ** 2)
        for k in range(1, t.size):
            disturbance[k] = phi * disturbance[k - 1] + e[k]
    if load is not None:
        disturbance = disturbance + np.where(t >= load[0], load[1] * q_mid, 0.0)

    def inflow(time):
        return q1 if time - DELAY >= step_time else q0

    def rhs(time, h):
        d = float(np.interp(time, t, disturbance))
        return [(inflow(time) + d - c * math.sqrt(max(h[0], 1e-12))) / area]

    solution = solve_ivp(rhs, (0.0, t[-1]), [h0], t_eval=t, rtol=1e-8, atol=1e-10, max_step=period)
    q = np.where(t >= step_time, q1, q0)
    h = solution.y[0] + noise * abs((q1 - q0) * 2 * math.sqrt(level) / c) * rng.standard_normal(t.size)
    return t, q, h


def identified_row(test_id, level, direction, t, q, h, *, campaign="tank"):
    """One ``test_params`` row from an identified simulated test (level: mean of settled ends)."""
    fit = identify(t, q, h)
    settled = float(np.mean(h[: max(3, int(0.05 * h.size))]) + np.mean(h[-max(3, int(0.05 * h.size)):])) / 2
    row = {"test_id": test_id, "campaign": campaign, "file": f"tank_{test_id:02d}_{direction}.csv",
           "level": settled, "direction": direction, "input_step": float(q[-1] - q[0]), "model": fit.model,
           "nrmse": fit.nrmse, "quality": fit.quality, "flags": list(fit.flags)}
    for name in ("gain", "time_constant", "dead_time"):
        for suffix in ("", "_lo", "_hi"):
            row[name + suffix] = getattr(fit, name + suffix)
    return row


def tank_campaign(levels, *, directions=("up", "down"), disturbed=None, wander=None, seed=0, campaign="tank",
                  area=AREA, c=OUTFLOW, noise=0.01):
    """Identified campaign: one test per level and direction; ``disturbed=(level, direction, load)``
    gives that test a load step of ``load`` (fraction of inflow) one time constant into the response."""
    rows = []
    for level in levels:
        for direction in directions:
            load = None
            if disturbed is not None and disturbed[0] == level and disturbed[1] == direction:
                tau = 2 * area * math.sqrt(level) / c
                load = (30.0 + DELAY + tau, disturbed[2])
            duration = 40.0 + 8.0 * 2 * area * math.sqrt(level) / c  # eight time constants after the step
            t, q, h = simulate_step(level, direction, load=load, wander=wander, seed=seed + len(rows),
                                    area=area, c=c, duration=duration, noise=noise)
            rows.append(identified_row(len(rows) + 1, level, direction, t, q, h, campaign=campaign))
    return pd.DataFrame(rows)
