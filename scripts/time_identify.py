"""Per-test identification speed on synthetic step tests (a timing script, not a unit test).

Run from the worktree: ``.venv/bin/python scripts/time_identify.py [N]``. It builds N
600-sample step tests with a short actuator ramp and noise (seeded), identifies each once
to warm up, then times ``identify`` over all of them three times and prints the best
per-test time in milliseconds.
"""

from __future__ import annotations

import sys
import time

import numpy as np

from mapper.identification.identify import identify
from mapper.identification.models import simulate_fopdt


def tests(count: int, seed: int = 1):
    rng = np.random.default_rng(seed)
    t = np.arange(600.0)
    for _ in range(count):
        gain, tau, theta = rng.uniform(0.5, 3.0), rng.uniform(10, 80), rng.uniform(0, 20)
        t_step = rng.uniform(40, 120)
        u = 40 + 10 * np.clip((t - t_step) / 4.0, 0.0, 1.0)
        y = 25 + simulate_fopdt(u, 1.0, gain, tau, theta) + rng.normal(0, 0.02 * gain * 10, t.size)
        yield t, u, y


def main() -> None:
    count = int(sys.argv[1]) if len(sys.argv) > 1 else 300
    data = list(tests(count))
    for t, u, y in data[:20]:
        identify(t, u, y)
    best = float("inf")
    for _ in range(3):
        start = time.perf_counter()
        for t, u, y in data:
            identify(t, u, y)
        best = min(best, time.perf_counter() - start)
    quality = {}
    for t, u, y in data:
        q = identify(t, u, y).quality
        quality[q] = quality.get(q, 0) + 1
    print(f"{count} tests: {1000 * best / count:.3f} ms per test (best of 3); grades {quality}")


if __name__ == "__main__":
    main()
