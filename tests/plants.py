"""Simulated plants and field-like records for the non-steady-start checks.

Each plant is an ordinary differential equation integrated with ``scipy.integrate.solve_ivp``
(an outside reference: the identification code never sees the equations), driven by a held
input with a transport delay. Records are sampled the way a historian stores by exception
(a sample when the value moved beyond a dead band, or when a maximum interval passed), then
put on a uniform grid the way the import does (input held, output interpolated), and cut
into one window per move: from the end of the previous move to the start of the next, with
the record before the window kept as the preceding record.

The local linearisations are textbook results:

* linear FOPDT ``tau dy/dt = -y + K u(t - theta)``: K and tau themselves;
* gravity-drained tank ``A dh/dt = q - c sqrt(h)`` (Torricelli outflow): at the level
  ``h = (q/c)^2``, ``K = 2 sqrt(h)/c`` and ``tau = 2 A sqrt(h)/c`` (linearise the square
  root; e.g. Seborg, Edgar & Mellichamp, *Process Dynamics and Control*, the liquid-level
  example with a nonlinear valve);
* heater with losses that grow with temperature ``C dT/dt = P - h (T - Ta) - k (T - Ta)^2``:
  with ``L'(T) = h + 2 k (T - Ta)``, ``K = 1/L'(T)`` and ``tau = C/L'(T)`` (linearise the
  loss term; same textbook method);
* level with a fixed outflow ``A dh/dt = q - q_out``: an integrator with gain ``1/A``.

For a move from input ``u_a`` to ``u_b`` the truth is the linearisation at the steady state
of the mid input ``(u_a + u_b)/2``: for the tank the secant gain equals it exactly (the level
is quadratic in the inflow), for the heater to second order in the move size.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.integrate import solve_ivp


@dataclass(frozen=True)
class Plant:
    name: str
    dead_time: float

    def derivative(self, x: float, u: float) -> float:  # pragma: no cover - overridden
        raise NotImplementedError

    def steady(self, u: float) -> float:  # pragma: no cover - overridden
        raise NotImplementedError

    def local(self, u: float) -> tuple[float, float]:  # pragma: no cover - overridden
        """(gain, time constant) of the linearisation at the steady state of input ``u``."""
        raise NotImplementedError


@dataclass(frozen=True)
class LinearPlant(Plant):
    gain: float = 2.0
    time_constant: float = 40.0

    def derivative(self, x, u):
        return (-x + self.gain * u) / self.time_constant

    def steady(self, u):
        return self.gain * u

    def local(self, u):
        return self.gain, self.time_constant


@dataclass(frozen=True)
class Tank(Plant):
    area: float = 60.0
    c: float = 2.0

    def derivative(self, x, u):
        return (u - self.c * math.sqrt(max(x, 0.0))) / self.area

    def steady(self, u):
        return (u / self.c) ** 2

    def local(self, u):
        root = math.sqrt(self.steady(u))
        return 2.0 * root / self.c, 2.0 * self.area * root / self.c


@dataclass(frozen=True)
class Heater(Plant):
    capacity: float = 400.0
    h: float = 4.0
    k: float = 0.05
    ambient: float = 20.0

    def derivative(self, x, u):
        rise = x - self.ambient
        return (u - self.h * rise - self.k * rise * rise) / self.capacity

    def steady(self, u):
        # k r^2 + h r - P = 0
        return self.ambient + (-self.h + math.sqrt(self.h**2 + 4 * self.k * u)) / (2 * self.k)

    def local(self, u):
        slope = self.h + 2 * self.k * (self.steady(u) - self.ambient)
        return 1.0 / slope, self.capacity / slope


@dataclass(frozen=True)
class LevelLoop(Plant):
    area: float = 50.0
    outflow: float = 10.0

    def derivative(self, x, u):
        return (u - self.outflow) / self.area

    def steady(self, u):  # pragma: no cover - an integrator has none
        return float("nan")

    def local(self, u):
        return 1.0 / self.area, float("inf")


def simulate(plant: Plant, move_times, levels, t_end: float, x0: float | None = None, step: float = 0.25):
    """Dense simulation (every ``step`` s) of ``plant`` for a held input that takes
    ``levels[i]`` from ``move_times[i - 1]`` (``levels[0]`` from the start)."""
    move_times = np.asarray(move_times, dtype=float)
    levels = np.asarray(levels, dtype=float)

    def u_at(time):
        return levels[int(np.searchsorted(move_times, time - plant.dead_time, side="right"))]

    start = plant.steady(levels[0]) if x0 is None else x0
    t_dense = np.arange(0.0, t_end + step / 2, step)
    # integrate piece by piece between input changes (seen at the plant after the delay)
    breaks = np.concatenate(([0.0], move_times + plant.dead_time, [t_end]))
    breaks = np.unique(np.clip(breaks, 0.0, t_end))
    out = np.empty(t_dense.size)
    x = start
    for a, b in zip(breaks[:-1], breaks[1:]):
        u_here = u_at(0.5 * (a + b))
        mask = (t_dense >= a) & (t_dense <= b)
        sol = solve_ivp(lambda _t, s: [plant.derivative(s[0], u_here)], (a, b), [x],
                        dense_output=True, rtol=1e-9, atol=1e-9)
        out[mask] = sol.sol(t_dense[mask])[0]
        x = float(sol.y[0, -1])
    u_dense = levels[np.searchsorted(move_times, t_dense, side="right")]
    return t_dense, u_dense, out


def by_exception(t, u, y, noise_sd: float, rng, dead_band: float, max_interval: float, period: float):
    """Noisy samples every ``period`` s, kept only when the output moved beyond the dead band
    since the last kept sample, the input changed, or ``max_interval`` passed."""
    pick = np.arange(0, t.size, int(round(period / (t[1] - t[0]))))
    t, u, y = t[pick], u[pick], y[pick] + rng.normal(0.0, noise_sd, pick.size)
    keep = [0]
    for i in range(1, t.size):
        last = keep[-1]
        if (abs(y[i] - y[last]) > dead_band or u[i] != u[i - 1] or u[i] != u[last]
                or t[i] - t[last] >= max_interval or i == t.size - 1):
            if u[i] != u[i - 1] and i - 1 != last:
                keep.append(i - 1)  # the last sample before an input change
            keep.append(i)
    keep = np.array(sorted(set(keep)))
    return t[keep], u[keep], y[keep]


@dataclass(frozen=True)
class Window:
    t: np.ndarray
    u: np.ndarray
    y: np.ndarray
    preceding: tuple[np.ndarray, np.ndarray]
    move: int
    hold: float  # time the input stayed at this move's level (s)
    u_from: float
    u_to: float


def windows(t, u, y, move_times, margin: float = 0.0):
    """One window per move: from the previous move to the next (or the record's end)."""
    out = []
    bounds = np.concatenate(([t[0]], move_times, [t[-1] + 1e-9]))
    for i, move in enumerate(move_times):
        lo = int(np.searchsorted(t, bounds[i] + margin))
        hi = int(np.searchsorted(t, bounds[i + 2] - margin))
        k = int(np.searchsorted(t, move))
        out.append(Window(t[lo:hi], u[lo:hi], y[lo:hi], (t[:lo], u[:lo]), i,
                          float(bounds[i + 2] - move), float(u[k - 1]), float(u[k])))
    return out


def move_sequence(rng, plant: Plant, base: float, size: float, count: int, first: float,
                  hold_range=(0.5, 1.5)):
    """Moves up and down around ``base``, each held 0.5-1.5 local time constants."""
    times, levels = [], [base]
    time = first
    for i in range(count):
        level = base + size * (1 if i % 2 == 0 else -1) * rng.uniform(0.6, 1.0) + size * rng.uniform(-0.3, 0.3)
        times.append(time)
        levels.append(level)
        tau = plant.local(0.5 * (levels[-2] + level))[1]
        if not math.isfinite(tau):
            tau = 60.0
        time += rng.uniform(*hold_range) * tau
    return np.array(times), np.array(levels), time
