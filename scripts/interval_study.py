"""Monte Carlo study of identification intervals under four noise types, with timing.

Not a unit test: run by hand (``python scripts/interval_study.py [runs] [kinds] [--before]``)
to measure the
coverage of the 95 % intervals, their median width as a multiple of the Cramér-Rao width
(Fisher information with the true noise covariance; Cramér 1946, Rao 1945) and the
per-test fit time. Seeded; the simulated plants are invented.

Noise types:
- ``white``: Gaussian, sd 0.05 on the design-brief example (K=2, tau=10, theta=3, T=0.5);
- ``ar1_fast``: AR(1), phi = 0.7, marginal sd 0.05 on the same example;
- ``ar1_slow``: white (1 % of the response) plus AR(1) wander with a correlation time of
  300 samples and a marginal sd of 3 % of the response; K=2, tau=40 s, theta=8 s, T=1 s,
  step at 60 s, 400 samples, half the tests up and half down;
- ``random_walk``: white (1 %) plus a random walk whose spread at the end of the record
  is 3 % of the response, same plant.
"""

from __future__ import annotations

import math
import sys
import time

import numpy as np
from scipy.signal import lfilter

from mapper.identification.identify import identify
from mapper.identification.models import fopdt_sensitivities, simulate_fopdt

PARAMETERS = ("gain", "time_constant", "dead_time")


def example(kind: str, rng: np.random.Generator, index: int):
    """One seeded test: t, u, y, truth, noise covariance (dense)."""
    if kind in ("white", "ar1_fast"):
        period, K, tau, theta = 0.5, 2.0, 10.0, 3.0
        t = np.arange(0.0, 110.0 + 1e-9, period)
        u = (t >= 10.0).astype(float)
        sd = 0.05
        phi = 0.7 if kind == "ar1_fast" else 0.0
        innovation = rng.normal(0.0, sd * math.sqrt(1 - phi**2), t.size)
        noise = lfilter([1.0], [1.0, -phi], innovation, zi=[phi * rng.normal(0.0, sd)])[0]
        lag = np.abs(np.subtract.outer(np.arange(t.size), np.arange(t.size)))
        cov = sd**2 * phi**lag
    else:
        period, K, tau, theta = 1.0, 2.0, 40.0, 8.0
        t = np.arange(400) * period
        sign = 1.0 if index % 2 == 0 else -1.0
        u = 50.0 + sign * 5.0 * (t >= 60.0)
        response = abs(K * 5.0)
        white = 0.01 * response
        n = t.size
        if kind == "ar1_slow":
            a = math.exp(-1.0 / 300.0)
            sd_slow = 0.03 * response
            slow = lfilter(
                [1.0], [1.0, -a], rng.normal(0.0, sd_slow * math.sqrt(1 - a**2), n), zi=[a * rng.normal(0.0, sd_slow)]
            )[0]
            lag = np.abs(np.subtract.outer(np.arange(n), np.arange(n)))
            cov = sd_slow**2 * a**lag + white**2 * np.eye(n)
        else:
            step_sd = 0.03 * response / math.sqrt(n)
            slow = np.cumsum(rng.normal(0.0, step_sd, n))
            k = np.arange(1, n + 1)
            cov = step_sd**2 * np.minimum.outer(k, k) + white**2 * np.eye(n)
        noise = slow + rng.normal(0.0, white, n)
    y = 20.0 + simulate_fopdt(u, period, K, tau, theta) + noise
    return t, u, y, {"gain": K, "time_constant": tau, "dead_time": theta}, cov


def cramer_rao(t, u, truth, cov) -> dict[str, float]:
    """Cramér-Rao sd with the offset free and the true (dense) noise covariance."""
    period = float(t[1] - t[0])
    S = fopdt_sensitivities(u, period, truth["gain"], truth["time_constant"], truth["dead_time"], u0=float(u[0]))
    J = np.column_stack([np.ones_like(t), S])
    info = J.T @ np.linalg.solve(cov, J)
    sd = np.sqrt(np.diag(np.linalg.inv(info)))[1:]
    return dict(zip(PARAMETERS, sd.tolist()))


def study(kind: str, runs: int, seed: int = 2026) -> dict:
    rng = np.random.default_rng(seed)
    inside = {k: 0 for k in PARAMETERS}
    ratio = {k: [] for k in PARAMETERS}
    values = {k: [] for k in PARAMETERS}
    seconds = []
    flagged = 0
    for i in range(runs):
        t, u, y, truth, cov = example(kind, rng, i)
        if i == 0 or kind in ("ar1_slow", "random_walk"):
            crb = cramer_rao(t, u, truth, cov)
        start = time.process_time()
        r = identify(t, u, y)
        seconds.append(time.process_time() - start)
        flagged += r.quality != "good"
        for k in PARAMETERS:
            lo, hi = getattr(r, k + "_lo"), getattr(r, k + "_hi")
            if lo is None or hi is None:
                continue
            inside[k] += lo <= truth[k] <= hi
            ratio[k].append((hi - lo) / (2 * 1.959964 * crb[k]))
            values[k].append(getattr(r, k))
    return {
        "coverage": {k: inside[k] / runs for k in PARAMETERS},
        "width_over_crb": {k: float(np.median(ratio[k])) for k in PARAMETERS},
        "spread_over_crb": {k: float(np.std(values[k])) / crb[k] for k in PARAMETERS},
        "not_good": flagged / runs,
        "median_fit_ms": 1e3 * float(np.median(seconds)),
    }


def main() -> None:
    args = [a for a in sys.argv[1:] if a != "--before"]
    if "--before" in sys.argv:
        from mapper.identification import identify as module
        from mapper.identification.uncertainty import sandwich_covariance_result

        module.disturbance_covariance = sandwich_covariance_result  # the AR(1) sandwich
        module.disturbance_flags = lambda *args, **kwargs: ([], [])  # no load-change scan
    runs = int(args[0]) if args else 200
    kinds = args[1].split(",") if len(args) > 1 else ["white", "ar1_fast", "ar1_slow", "random_walk"]
    print(f"{runs} runs per noise type" + (" (previous rule)" if "--before" in sys.argv else ""))
    print(
        "noise        | coverage K / tau / theta | width/CRB K / tau / theta | spread/CRB K / tau | not good | fit ms"
    )
    for kind in kinds:
        s = study(kind, runs)
        c, w, sp = s["coverage"], s["width_over_crb"], s["spread_over_crb"]
        print(
            f"{kind:12s} | {c['gain']:.2f} / {c['time_constant']:.2f} / {c['dead_time']:.2f}"
            f" | {w['gain']:.2f} / {w['time_constant']:.2f} / {w['dead_time']:.2f}"
            f" | {sp['gain']:.2f} / {sp['time_constant']:.2f} | {s['not_good']:.2f} | {s['median_fit_ms']:.2f}"
        )


if __name__ == "__main__":
    main()
