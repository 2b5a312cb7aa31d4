"""Sample campaigns written from the exchanger model: test plans, records and campaign files.

The plant (a steam-heated hot-water exchanger) lives in :mod:`mapper.demo.exchanger`; this
module plans the step tests of the two sample campaigns (before and after an overhaul),
simulates each with coloured measurement noise and a few deliberately imperfect tests,
and writes the folders (:func:`write_sample_campaign`). The ``mapper demo`` command that
runs the whole job on the written folder lives elsewhere.

Run ``python -m mapper.demo --write sample_campaign`` to regenerate the folder (then copy it to
``mapper/demo/sample_campaign/``, the packaged copy that ``mapper demo`` reads); output is
deterministic for a given seed.
"""

from __future__ import annotations

import argparse
import csv
import io
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from mapper.demo.exchanger import (
    CLEAN_EXCHANGER,
    FOULED_EXCHANGER,
    linearised_parameters,
    simulate_exchanger,
    steady_outlet_temperature,
    valve_for_temperature,
    valve_ramp,
)

__all__ = ["DEFAULT_SEED", "write_sample_campaign", "main"]

DEFAULT_SEED = 2026


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
