"""Scenario simulator behind the bundled ``sample_campaign/`` folder.

The scenario is ours: a steam-heated shell-and-tube exchanger that makes hot water for a
process. Steam condenses on the tube walls; the steam control valve sets the heat input;
the hot-water demand flow sets the operating point. The outlet temperature is measured by
a thermowell some way down the outlet pipe, so the reading lags and is delayed.

This module owns the physics (:func:`simulate_exchanger`), its analytic linearisation
(:func:`linearised_parameters`) and the writing of the two sample campaigns
(:func:`write_sample_campaign`). It depends on numpy and scipy only. The ``mapper demo``
command that runs the whole job on the written folder lives elsewhere.

Run ``python -m mapper.demo --write sample_campaign`` to regenerate the folder (then copy it to
``mapper/demo/sample_campaign/``, the packaged copy that ``mapper demo`` reads); output is
deterministic for a given seed.
"""

from __future__ import annotations

import argparse
import csv
import io
import math
from collections.abc import Callable
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

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
    "write_sample_campaign",
    "main",
]

DEFAULT_SEED = 2026


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


# --------------------------------------------------------------------------- campaigns

@dataclass(frozen=True)
class _TestPlan:
    file: str
    level: float          # nominal outlet temperature, degC
    flow: float           # kg/s
    direction: str        # "up" or "down"
    step: float           # valve change, % (positive number)
    note: str
    defect: str = ""      # "", "disturbed", "cut_short", "clipped"
    centre_valve: float | None = None  # valve the step is centred on (None: from level)


_STEP_SIZES = (2.0, 3.0, 4.0, 5.0, 6.0, 8.0, 10.0, 12.0, 15.0)
_TARGET_CHANGE = 6.0   # degC wanted from each ordinary step


def _round_half(x: float) -> float:
    return round(x * 2.0) / 2.0


def _step_size(flow, level, inlet, parameters) -> float:
    valve = valve_for_temperature(flow, level, inlet, parameters)
    gain = linearised_parameters(flow, valve, parameters=parameters)["gain"]
    return min(_STEP_SIZES, key=lambda s: abs(s * gain - _TARGET_CHANGE))


# (flow kg/s, nominal outlet degC): higher demand is run at a lower outlet temperature.
_LEVELS_2026 = ((0.5, 80.0), (0.7, 72.0), (1.0, 64.0), (1.4, 56.0), (1.9, 48.0), (2.5, 40.0))
_LEVELS_2024 = ((0.6, 76.0), (1.2, 60.0), (2.2, 44.0))


def _plans_2026(inlet, parameters) -> list[_TestPlan]:
    plans = []
    for flow, level in _LEVELS_2026:
        step = _step_size(flow, level, inlet, parameters)
        note = f"demand {flow:.2f} kg/s"
        tag = f"t{level:03.0f}"
        counts = {"up": 3, "down": 2} if level == 64.0 else {"up": 1, "down": 1}
        for direction in ("up", "down"):
            for k in range(counts[direction]):
                extra = f", repeat {k + 1}" if counts[direction] > 1 else ""
                plans.append(_TestPlan(f"{tag}_{direction}_{k + 1}.csv", level, flow,
                                       direction, step, note + extra))
        if level == 80.0:
            plans.append(_TestPlan(f"{tag}_up_2.csv", level, flow, "up", 10.0,
                                   note + ", larger step tried", "clipped",
                                   centre_valve=valve_for_temperature(flow, level, inlet,
                                                                      parameters) + 4.0))
        if level == 72.0:
            plans.append(_TestPlan(f"{tag}_down_2.csv", level, flow, "down", step,
                                   note + ", recorder stopped early", "cut_short"))
        if level == 56.0:
            plans.append(_TestPlan(f"{tag}_up_2.csv", level, flow, "up", step,
                                   note + ", mains water changeover during test",
                                   "disturbed"))
    return plans


def _plans_2024(inlet, parameters) -> list[_TestPlan]:
    plans = []
    for flow, level in _LEVELS_2024:
        step = _step_size(flow, level, inlet, parameters)
        for direction in ("up", "down"):
            plans.append(_TestPlan(f"t{level:03.0f}_{direction}.csv", level, flow, direction,
                                   step, f"demand {flow:.2f} kg/s, before overhaul"))
    return plans


def _coloured_noise(rng, n, sd, coefficient=0.6) -> np.ndarray:
    """AR(1) measurement noise with marginal standard deviation ``sd``."""
    white = rng.normal(0.0, sd * math.sqrt(1.0 - coefficient**2), n)
    noise = np.empty(n)
    noise[0] = rng.normal(0.0, sd)
    for k in range(1, n):
        noise[k] = coefficient * noise[k - 1] + white[k]
    return noise


def _run_test(plan: _TestPlan, rng, *, inlet, period, noise_sd, parameters):
    """Simulate one step test; returns (t, valve, measured output, truth dict)."""
    centre = plan.centre_valve
    if centre is None:
        centre = valve_for_temperature(plan.flow, plan.level, inlet, parameters)
    low = _round_half(centre - plan.step / 2.0)
    high = low + plan.step
    before, after = (low, high) if plan.direction == "up" else (high, low)
    lin = linearised_parameters(plan.flow, (low + high) / 2.0, parameters=parameters)
    tau, theta = lin["time_constant"], lin["dead_time"]
    pre = 10.0 * math.ceil(max(60.0, 0.75 * tau) / 10.0)
    post = 10.0 * math.ceil((theta + 6.0 * tau) / 10.0)
    if plan.defect == "cut_short":
        post = 10.0 * math.floor((theta + 1.5 * tau) / 10.0)
    t = np.arange(0.0, pre + post + period / 2.0, period)
    step_time = pre + float(rng.uniform(0.0, period))

    drift_phase = float(rng.uniform(0.0, 2.0 * math.pi))
    dip_start = step_time + theta + 1.0 * tau

    def inlet_fn(time):
        value = inlet + 0.2 * np.sin(2.0 * math.pi * time / 5400.0 + drift_phase)
        if plan.defect == "disturbed":
            value = value - 3.0 * np.interp(time, [dip_start, dip_start + 30.0,
                                                   dip_start + 1.5 * tau,
                                                   dip_start + 1.5 * tau + 60.0],
                                            [0.0, 1.0, 1.0, 0.0])
        return value

    valve_fn = valve_ramp(before, [(step_time, after)], parameters.valve_rate)
    run = simulate_exchanger(t, valve_fn, flow=plan.flow, inlet_temperature=inlet_fn,
                             parameters=parameters)
    measured = run.outlet_temperature + _coloured_noise(rng, t.size, noise_sd)
    if plan.defect == "clipped":
        measured = np.minimum(measured, 100.0)  # transmitter saturates at range top
    y_before = steady_outlet_temperature(plan.flow, before, inlet, parameters)
    y_after = steady_outlet_temperature(plan.flow, after, inlet, parameters)
    truth = {
        "file": plan.file, "nominal_level": plan.level, "flow": plan.flow,
        "direction": plan.direction, "valve_before": before, "valve_after": after,
        "input_step": after - before, "step_time": step_time,
        "output_before": y_before, "output_after": y_after,
        "step_gain": (y_after - y_before) / (after - before),
        "gain": lin["gain"], "time_constant": tau, "dead_time": theta,
        "lags": lin["lags"], "transport_delay": lin["transport_delay"],
        "record_end": float(t[-1]), "defect": plan.defect or "none", "note": plan.note,
    }
    return t, run.valve_position, measured, truth


def _csv_text(t, valve, output, period) -> str:
    buffer = io.StringIO()
    buffer.write("t_s,steam_valve_pct,outlet_temp_c\n")
    time_format = "{:.0f}" if float(period).is_integer() else "{:.1f}"
    for a, b, c in zip(t, valve, output):
        buffer.write(f"{time_format.format(a)},{b:.2f},{c:.3f}\n")
    return buffer.getvalue()


def _toml_text(name, plans, explicit_levels, header) -> str:
    description = (f"{name}: the steam valve stepped open-loop, in manual, at several hot-water "
                   "demand flows; levels are nominal outlet temperatures. Simulated by mapper "
                   "(invented scenario, not plant data).")
    lines = [f"# {line}" for line in header] + [
        f'name = "{name}"', f'description = "{description}"', "", "[columns]", 'time = "t_s"',
        'input = "steam_valve_pct"',
        'output = "outlet_temp_c"', "", "[units]", 'input = "%"', 'output = "degC"', "",
        "[ranges]", "input = [0, 100]", "output = [0, 100]",
    ]
    for plan in plans:
        lines += ["", "[[tests]]", f'file = "{plan.file}"']
        if explicit_levels:
            lines.append(f"level = {plan.level:.1f}")
        lines.append(f'note = "{plan.note}"')
    return "\n".join(lines) + "\n"


_CAMPAIGNS = (
    # folder, name, parameters, inlet degC, period s, noise sd degC, explicit levels, plans
    ("exchanger_2026", "Hot-water exchanger E-3, after overhaul, 2026", CLEAN_EXCHANGER,
     15.0, 1.0, 0.05, True, _plans_2026),
    ("exchanger_2024", "Hot-water exchanger E-3, before overhaul, 2024", FOULED_EXCHANGER,
     13.0, 2.0, 0.08, False, _plans_2024),
)


def write_sample_campaign(folder, *, seed: int = DEFAULT_SEED) -> dict:
    """Simulate both sample campaigns and write them under ``folder``.

    Parameters
    ----------
    folder : str or Path
        Target folder; ``exchanger_2026/`` and ``exchanger_2024/`` are created inside it
        (each a campaign file and one CSV per test), plus ``true_parameters.csv``.
    seed : int
        Seed of the noise, drift phase and step timing (default 2026).

    Returns
    -------
    dict
        ``{"folder": str, "bytes": int, "campaigns": [{"folder", "name", "tests": [truth]}]}``
        where each truth dict holds the file, nominal level, flow, valve positions, the
        linearised ``gain``, ``time_constant``, ``dead_time``, the secant ``step_gain`` of
        the finite step, and the ``defect`` built in (``none``, ``disturbed``, ``cut_short``,
        ``clipped``).
    """
    root = Path(folder)
    summary: dict[str, Any] = {"folder": str(root), "bytes": 0, "campaigns": []}
    truth_rows = []
    for index, (sub, name, params, inlet, period, noise_sd, explicit, planner) in enumerate(
            _CAMPAIGNS):
        target = root / sub
        target.mkdir(parents=True, exist_ok=True)
        plans = planner(inlet, params)
        tests = []
        for number, plan in enumerate(plans):
            rng = np.random.default_rng([seed, index, number])
            t, valve, output, truth = _run_test(plan, rng, inlet=inlet, period=period,
                                                noise_sd=noise_sd, parameters=params)
            text = _csv_text(t, valve, output, period)
            (target / plan.file).write_text(text, encoding="utf-8", newline="\n")
            summary["bytes"] += len(text)
            tests.append(truth)
            truth_rows.append({"campaign": sub, **truth})
        header = [
            "Sample campaign simulated by mapper.demo (invented scenario, not plant data).",
            "Steam valve stepped open-loop at several hot-water demand flows;",
            "levels are nominal outlet temperatures; each note gives the demand flow.",
        ]
        toml = _toml_text(name, plans, explicit, header)
        (target / "campaign.toml").write_text(toml, encoding="utf-8", newline="\n")
        summary["bytes"] += len(toml)
        summary["campaigns"].append({"folder": sub, "name": name, "tests": tests})
    summary["bytes"] += _write_truth(root / "true_parameters.csv", truth_rows)
    return summary


def _write_truth(path: Path, rows) -> int:
    columns = ["campaign", "file", "nominal_level", "flow", "direction", "valve_before",
               "valve_after", "output_before", "output_after", "step_gain", "gain",
               "time_constant", "dead_time", "transport_delay", "defect"]
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(columns)
    for row in rows:
        writer.writerow([f"{row[c]:.4g}" if isinstance(row[c], float) else row[c]
                         for c in columns])
    text = buffer.getvalue()
    path.write_text(text, encoding="utf-8", newline="\n")
    return len(text)


def main(argv=None) -> int:
    """Command-line entry: ``python -m mapper.demo --write FOLDER [--seed N]``."""
    parser = argparse.ArgumentParser(prog="python -m mapper.demo",
                                     description="Write the simulated sample campaigns.")
    parser.add_argument("--write", metavar="FOLDER", required=True,
                        help="folder to write exchanger_2026/ and exchanger_2024/ into")
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED, help="noise seed")
    args = parser.parse_args(argv)
    summary = write_sample_campaign(args.write, seed=args.seed)
    for campaign in summary["campaigns"]:
        print(f"{campaign['folder']}: {len(campaign['tests'])} tests")
    print(f"{summary['bytes']} bytes written under {summary['folder']}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
