"""Shared fixtures: seeded synthetic step tests, small campaigns, and the real entry point."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

ENTRY_POINT = Path(sys.executable).with_name("mapper")


def fopdt_step(t, gain, time_constant, dead_time, step_time, step):
    """Exact first-order-plus-dead-time response to an ideal step (textbook formula)."""
    elapsed = np.clip(t - step_time - dead_time, 0, None)
    return gain * step * (1 - np.exp(-elapsed / time_constant))


def write_step_csv(path: Path, *, gain=2.0, time_constant=10.0, dead_time=3.0, period=1.0,
                   duration=200.0, step_time=40.0, u0=50.0, step=10.0, y0=20.0, noise=0.02,
                   seed=0, columns=("t_s", "valve_pct", "level_cm")) -> Path:
    rng = np.random.default_rng(seed)
    t = np.arange(0.0, duration, period)
    u = np.where(t >= step_time, u0 + step, u0)
    y = y0 + fopdt_step(t, gain, time_constant, dead_time, step_time, step)
    y = y + rng.normal(0, noise * abs(gain * step), len(t))
    pd.DataFrame({columns[0]: t, columns[1]: u, columns[2]: np.round(y, 5)}).to_csv(path, index=False)
    return path


CAMPAIGN_HEAD = '''name = "{name}"
[columns]
time = "t_s"
input = "valve_pct"
output = "level_cm"
[units]
input = "%"
output = "cm"
'''


def write_campaign(folder: Path, tests: list[dict], name: str = "Trial campaign", extra: str = "") -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    text = CAMPAIGN_HEAD.format(name=name) + extra
    for i, spec in enumerate(tests):
        spec = dict(spec)
        file = spec.pop("file", f"step_{i}.csv")
        level = spec.pop("level", None)
        note = spec.pop("note", None)
        spec.setdefault("seed", i)
        write_step_csv(folder / file, **spec)
        text += f'\n[[tests]]\nfile = "{file}"\n'
        if level is not None:
            text += f"level = {level}\n"
        if note is not None:
            text += f"note = {note!r}\n".replace("'", '"')
    (folder / "campaign.toml").write_text(text)
    return folder


def run_mapper(*args, db: Path | None = None, cwd: Path | None = None, env: dict | None = None,
               timeout: float = 300) -> subprocess.CompletedProcess:
    """Run the installed console command (the real entry point)."""
    command = [str(ENTRY_POINT)] if ENTRY_POINT.exists() else [sys.executable, "-m", "mapper.app.cli"]
    if db is not None:
        command += ["--db", str(db)]
    full_env = dict(os.environ, **(env or {}))
    full_env.setdefault("MAPPER_LOCK_WAIT", "2")
    return subprocess.run(command + [str(a) for a in args], capture_output=True, text=True,
                          cwd=cwd, env=full_env, timeout=timeout)


@pytest.fixture
def small_campaign(tmp_path: Path) -> Path:
    """Four clean tests at two levels, up and down."""
    return write_campaign(tmp_path / "campaign", [
        dict(level=30.0), dict(level=30.0, u0=60.0, step=-10.0),
        dict(level=60.0, gain=3.0), dict(level=60.0, gain=3.0, u0=60.0, step=-10.0, note="after service"),
    ])
