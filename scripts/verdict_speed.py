"""How long a whole verdict takes for ten tested levels (run by hand; no timing in unit tests).

Two seeded campaigns of a gravity-drained tank, up and down steps at ten levels: straight sides (one
controller serves) and a cross-section growing with height (a schedule is needed). The map is built
once; the figure is the verdict alone (search, schedule bands, exact margins, uncut simulations),
median of five runs, as wall-clock and as CPU time of this process (on a busy machine the wall time
mostly measures waiting).

    python scripts/verdict_speed.py
"""

from __future__ import annotations

import math
import time

import numpy as np
import pandas as pd

from mapper.analysis.opmap import build_map
from mapper.analysis.verdict import decide

Z = 1.959963984540054


def tank_campaign(area, levels, dead_time=0.5, seed=1, rel_sd=0.025) -> pd.DataFrame:
    """Linearised A(h) dh/dt = q - sqrt(h): K = 2 sqrt(h), tau = 2 A(h) sqrt(h) (textbook, from memory)."""
    rng = np.random.default_rng(seed)
    rows = []
    for level in levels:
        gain, tau = 2 * math.sqrt(level), 2 * area(level) * math.sqrt(level)
        for direction in ("up", "down"):
            k = gain * (1 + rel_sd * rng.standard_normal())
            t = tau * (1 + rel_sd * rng.standard_normal())
            th = dead_time * (1 + 0.05 * rng.standard_normal())
            rows.append({"test_id": len(rows) + 1, "campaign": "speed", "file": f"t{len(rows)}.csv", "level": level,
                         "direction": direction, "input_step": 1.0, "model": "fopdt",
                         "gain": k, "gain_lo": k - Z * rel_sd * gain, "gain_hi": k + Z * rel_sd * gain,
                         "time_constant": t, "time_constant_lo": t - Z * rel_sd * tau,
                         "time_constant_hi": t + Z * rel_sd * tau, "dead_time": th,
                         "dead_time_lo": th - Z * 0.05 * dead_time, "dead_time_hi": th + Z * 0.05 * dead_time,
                         "nrmse": 0.01, "quality": "good", "flags": []})
    return pd.DataFrame(rows)


def main() -> None:
    levels = list(np.geomspace(1.0, 4.0, 10))
    for label, area in (("straight tank", lambda h: 2.0), ("widening tank", lambda h: 1.0 + h * h)):
        params = tank_campaign(area, levels)
        opmap = build_map(params)
        decide(params, opmap=opmap)  # warm-up (imports, caches)
        walls, cpus = [], []
        for _ in range(5):
            wall, cpu = time.perf_counter(), time.process_time()
            verdict = decide(params, opmap=opmap)
            walls.append(time.perf_counter() - wall)
            cpus.append(time.process_time() - cpu)
        print(f"{label}, 10 levels: {verdict.decision}; verdict {np.median(walls):.3f} s wall, "
              f"{np.median(cpus):.3f} s CPU (median of 5)")


if __name__ == "__main__":
    main()
