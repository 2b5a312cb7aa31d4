"""Plant model behind the sample campaign: a steam-heated hot-water exchanger.

The scenario is ours: a steam-heated shell-and-tube exchanger that makes hot water for a
process. Steam condenses on the tube walls; the steam control valve sets the heat input;
the hot-water demand flow sets the operating point. The outlet temperature is measured by
a thermowell some way down the outlet pipe, so the reading lags and is delayed.

This module owns the physics: the constants (:class:`ExchangerParameters`), the installed
valve characteristic, the simulation (:func:`simulate_exchanger`) and its analytic
linearisation (:func:`linearised_parameters`). It depends on numpy and scipy only; the
test plans and the writing of the campaigns live in :mod:`mapper.demo.scenario`.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, replace

import numpy as np
from scipy.integrate import solve_ivp

__all__ = [
    "ExchangerParameters",
    "ExchangerRun",
    "CLEAN_EXCHANGER",
    "FOULED_EXCHANGER",
    "valve_characteristic",
    "valve_for_temperature",
    "steady_outlet_temperature",
    "simulate_exchanger",
    "linearised_parameters",
    "valve_ramp",
]


@dataclass(frozen=True)
class ExchangerParameters:
    """Physical constants of the exchanger (SI units, temperatures in degC).

    Attributes
    ----------
    water_holdup : float
        Water held in the tube side, kg (default 60).
    wall_heat_capacity : float
        Heat capacity of tubes and shell that the steam must warm, J/K (default 80e3).
    wall_conductance : float
        Overall heat-transfer coefficient times area, wall to water, W/K (default 12e3).
        Fouling lowers it.
    steam_capacity : float
        Steam flow through the fully open valve, kg/s (default 0.21).
    latent_heat : float
        Latent heat of the steam, J/kg (default 2.133e6, saturated steam near 4 bar abs).
    valve_authority : float
        Installed authority of the linear-trim steam valve, 0-1 (default 0.5); below 1 the
        installed characteristic bows upward (more gain near closed).
    specific_heat : float
        Specific heat of water, J/(kg K) (default 4186).
    pipe_volume : float
        Outlet pipe volume between exchanger and thermowell, m3 (default 0.030).
    water_density : float
        Density of the hot water, kg/m3 (default 983).
    sensor_time_constant : float
        First-order lag of the thermowell and transmitter, s (default 2.0).
    valve_rate : float
        Stroking speed of the valve, % per second (default 2.0).
    """

    water_holdup: float = 60.0
    wall_heat_capacity: float = 80e3
    wall_conductance: float = 12e3
    steam_capacity: float = 0.21
    latent_heat: float = 2.133e6
    valve_authority: float = 0.5
    specific_heat: float = 4186.0
    pipe_volume: float = 0.030
    water_density: float = 983.0
    sensor_time_constant: float = 2.0
    valve_rate: float = 2.0

    @property
    def full_heat(self) -> float:
        """Heat input with the valve fully open, W."""
        return self.steam_capacity * self.latent_heat


#: The exchanger after its overhaul (the 2026 campaign).
CLEAN_EXCHANGER = ExchangerParameters()
#: The exchanger before the overhaul (2024): fouled tubes and a part-blocked steam strainer.
FOULED_EXCHANGER = replace(CLEAN_EXCHANGER, wall_conductance=6.5e3, steam_capacity=0.19)


@dataclass(frozen=True)
class ExchangerRun:
    """One noise-free simulated record (arrays share the time base ``t``, seconds).

    ``outlet_temperature`` is what the thermowell reads (after pipe delay and sensor lag);
    ``water_temperature`` is the water leaving the exchanger; ``steam_heat`` is in W.
    """

    t: np.ndarray
    valve_position: np.ndarray
    inlet_temperature: np.ndarray
    water_temperature: np.ndarray
    wall_temperature: np.ndarray
    outlet_temperature: np.ndarray
    steam_heat: np.ndarray
    flow: float
    transport_delay: float


def valve_characteristic(position, authority: float = 0.5):
    """Installed flow fraction of a linear-trim valve in series with line resistance.

    Parameters
    ----------
    position : float or array
        Valve position, % of travel (clipped to 0-100).
    authority : float
        Valve authority N, the share of the total pressure drop taken by the open valve.

    Returns
    -------
    float or array
        Flow as a fraction of full-open flow, ``x / sqrt(N + (1 - N) x**2)``, x = position/100.

    Notes
    -----
    The installed characteristic of a linear valve with authority N (textbook result,
    e.g. Seborg, Edgar & Mellichamp, *Process Dynamics and Control*; from memory).
    """
    x = np.clip(np.asarray(position, dtype=float) / 100.0, 0.0, 1.0)
    return x / np.sqrt(authority + (1.0 - authority) * x * x)


def _characteristic_slope(position, authority: float) -> float:
    """d(flow fraction)/d(position in %)."""
    x = float(position) / 100.0
    return authority / (authority + (1.0 - authority) * x * x) ** 1.5 / 100.0


def steady_outlet_temperature(flow, position, inlet_temperature=15.0, parameters=CLEAN_EXCHANGER):
    """Outlet temperature at steady state, degC: ``T_in + Q_steam / (w c)``."""
    heat = parameters.full_heat * valve_characteristic(position, parameters.valve_authority)
    return inlet_temperature + heat / (flow * parameters.specific_heat)


def valve_for_temperature(flow, outlet_temperature, inlet_temperature=15.0,
                          parameters=CLEAN_EXCHANGER) -> float:
    """Valve position (%) that holds ``outlet_temperature`` at steady state.

    Raises
    ------
    ValueError
        When the temperature cannot be reached with the valve inside 0-100 %.
    """
    fraction = flow * parameters.specific_heat * (outlet_temperature - inlet_temperature)
    fraction /= parameters.full_heat
    if not 0.0 <= fraction <= 1.0:
        raise ValueError(
            f"outlet {outlet_temperature} degC at {flow} kg/s needs {100 * fraction:.0f} % of "
            "full steam; choose a lower temperature or flow"
        )
    n = parameters.valve_authority
    return 100.0 * fraction * math.sqrt(n) / math.sqrt(1.0 - (1.0 - n) * fraction**2)


def _as_function(value) -> Callable[[float], float]:
    if callable(value):
        return value
    constant = float(value)
    return lambda _t: constant


def valve_ramp(start: float, moves, rate: float) -> Callable:
    """Valve position against time for commanded moves made at a finite stroking speed.

    Parameters
    ----------
    start : float
        Position before the first move, %.
    moves : sequence of (time_s, target_pct)
        Commanded changes, in time order.
    rate : float
        Stroking speed, % per second.

    Returns
    -------
    callable
        ``f(t)`` accepting a float or an array of times, giving the position in %.
    """
    knots_t, knots_x = [-1e12], [float(start)]
    position = float(start)
    for time, target in moves:
        knots_t += [float(time), float(time) + abs(target - position) / rate]
        knots_x += [position, float(target)]
        position = float(target)
    knots_t.append(1e12)
    knots_x.append(position)
    times, values = np.array(knots_t), np.array(knots_x)
    return lambda t: np.interp(t, times, values)


def simulate_exchanger(t, valve_position, *, flow, inlet_temperature=15.0,
                       parameters: ExchangerParameters = CLEAN_EXCHANGER) -> ExchangerRun:
    """Simulate the exchanger from steady state with ``scipy.integrate.solve_ivp``.

    Parameters
    ----------
    t : array
        Sample times, s, increasing.
    valve_position : float or callable
        Actual valve position, %, as a constant or a function of time (see :func:`valve_ramp`).
    flow : float
        Hot-water demand flow, kg/s (constant over the record).
    inlet_temperature : float or callable
        Cold-water inlet temperature, degC, constant or a function of time.
    parameters : ExchangerParameters
        Physical constants.

    Returns
    -------
    ExchangerRun
        Noise-free signals at ``t``.

    Notes
    -----
    Three lumped energy balances (wall, water, sensor), steam heat entering the wall:

    ``C_w dT_w/dt = Q_s - UA (T_w - T)``,
    ``m c dT/dt = w c (T_in - T) + UA (T_w - T)``,
    ``tau_s dT_m/dt = T - T_m``, with ``Q_s = w_s,max f(x) lambda``.

    The outlet pipe is plug flow, a pure delay ``rho V_pipe / w``. With the flow constant the
    delay and the sensor lag commute, so the reading is the sensor state shifted by the
    delay, taken from the solver's dense (interpolated) output. The valve, not the
    condensing film, limits the steam flow; the shell pressure floats below supply.
    """
    t = np.asarray(t, dtype=float)
    p = parameters
    valve_fn, inlet_fn = _as_function(valve_position), _as_function(inlet_temperature)
    delay = p.water_density * p.pipe_volume / flow
    t_start = float(t[0]) - delay - 1.0

    def heat(time):
        return p.full_heat * valve_characteristic(valve_fn(time), p.valve_authority)

    def rhs(time, state):
        wall, water, sensor = state
        transfer = p.wall_conductance * (wall - water)
        return [
            (heat(time) - transfer) / p.wall_heat_capacity,
            (flow * p.specific_heat * (inlet_fn(time) - water) + transfer)
            / (p.water_holdup * p.specific_heat),
            (water - sensor) / p.sensor_time_constant,
        ]

    q0 = float(heat(t_start))
    water0 = float(inlet_fn(t_start)) + q0 / (flow * p.specific_heat)
    state0 = [water0 + q0 / p.wall_conductance, water0, water0]
    solution = solve_ivp(rhs, (t_start, float(t[-1])), state0, method="RK45", rtol=1e-9,
                         atol=1e-9, max_step=0.5, dense_output=True)
    if not solution.success:  # pragma: no cover - the model is smooth and well scaled
        raise RuntimeError(f"exchanger simulation failed: {solution.message}")
    wall, water, _ = solution.sol(t)
    measured = solution.sol(np.maximum(t - delay, t_start))[2]
    valve = np.asarray(valve_fn(t), dtype=float) * np.ones_like(t)
    return ExchangerRun(
        t=t, valve_position=valve,
        inlet_temperature=np.array([inlet_fn(x) for x in t], dtype=float),
        water_temperature=water, wall_temperature=wall, outlet_temperature=measured,
        steam_heat=np.asarray(heat(t), dtype=float) * np.ones_like(t),
        flow=float(flow), transport_delay=delay,
    )


def linearised_parameters(flow, valve_position, *,
                          parameters: ExchangerParameters = CLEAN_EXCHANGER) -> dict:
    """Analytic linearisation of the exchanger at an operating point.

    Parameters
    ----------
    flow : float
        Hot-water demand flow, kg/s.
    valve_position : float
        Valve position of the operating point, %.
    parameters : ExchangerParameters

    Returns
    -------
    dict
        ``gain`` (degC per %), ``time_constant`` and ``dead_time`` (s) of the first-order-
        plus-dead-time approximation, plus ``lags`` (the three exact time constants, s,
        largest first) and ``transport_delay`` (s).

    Notes
    -----
    Gain: ``w_s,max lambda f'(x) / (w c)`` from the steady energy balance. Wall and water
    lags are the roots of ``s^2 + (a + b + d) s + a d`` with ``a = UA/C_w``,
    ``b = UA/(m c)``, ``d = w/m``. The three lags and the pipe delay are reduced to
    first order plus dead time with the half rule of Skogestad (2003): the largest lag
    plus half the second is the time constant; the other half, the smaller lags and the
    delay make the dead time.

    References
    ----------
    Skogestad, S. (2003). Simple analytic rules for model reduction and PID controller
    tuning. *Journal of Process Control*, 13, 291-309.
    """
    p = parameters
    gain = p.full_heat * _characteristic_slope(valve_position, p.valve_authority)
    gain /= flow * p.specific_heat
    a = p.wall_conductance / p.wall_heat_capacity
    b = p.wall_conductance / (p.water_holdup * p.specific_heat)
    d = flow / p.water_holdup
    total = a + b + d
    root = math.sqrt(total * total - 4.0 * a * d)
    lags = sorted([2.0 / (total - root), 2.0 / (total + root), p.sensor_time_constant],
                  reverse=True)
    delay = p.water_density * p.pipe_volume / flow
    return {
        "gain": gain,
        "time_constant": lags[0] + lags[1] / 2.0,
        "dead_time": delay + lags[1] / 2.0 + lags[2],
        "lags": tuple(lags),
        "transport_delay": delay,
    }
