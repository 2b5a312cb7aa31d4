"""Figures for the non-steady-start checks (a report script, not a unit test).

Run from the worktree: ``.venv/bin/python scripts/nonsteady_figures.py``. Uses the plants and
records of ``tests/test_nonsteady.py`` and prints, per plant, with and without the starting
state: moves within 5 % (gain) and 10 % (time constant) of the local linearisation among the
moves held 0.8 time constants or more, 95 % interval coverage of both, grades, and how many
moves were called integrating.
"""

from __future__ import annotations

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

from test_nonsteady import PLANTS, SEEDS, accurate, record  # noqa: E402

from mapper.identification.identify import identify  # noqa: E402


def main() -> None:
    for name, (plant, base, size) in PLANTS.items():
        for start_state in (True, False):
            held = good = covered = total = integrating = 0
            grades = {"good": 0, "suspect": 0, "rejected": 0}
            for seed in SEEDS:
                for w, (gain, tau), flags in record(plant, base, size, seed):
                    kw = {"preceding": w.preceding} if start_state else {}
                    r = identify(w.t, w.u, w.y, import_flags=flags, start_state=start_state, **kw)
                    total += 1
                    grades[r.quality] += 1
                    integrating += r.model == "integrating"
                    covered += bool(r.gain_lo is not None and r.gain_lo <= gain <= r.gain_hi
                                    and r.time_constant_lo is not None
                                    and r.time_constant_lo <= tau <= r.time_constant_hi)
                    if w.hold >= 0.8 * tau:
                        held += 1
                        good += accurate(r, gain, tau)
            label = "with start state   " if start_state else "without (from rest)"
            print(f"{name:7s} {label}: accurate {good}/{held}, coverage {covered}/{total}, "
                  f"grades {grades}, integrating {integrating}")


if __name__ == "__main__":
    main()
