"""Shared fixtures: seeded synthetic step tests, small campaigns, and the real entry point."""

from __future__ import annotations

import contextlib
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
               timeout: float = 300, real_process: bool = False) -> subprocess.CompletedProcess:
    """Run a mapper command and return its exit status, stdout and stderr.

    By default the command runs in this process through typer's test runner (no interpreter
    start-up per call, so the suite stays quick); ``real_process=True`` runs the installed
    console command instead, for the checks that need the real entry point or a second process.
    """
    argv = (["--db", str(db)] if db is not None else []) + [str(a) for a in args]
    overlay = {"MAPPER_LOCK_WAIT": os.environ.get("MAPPER_LOCK_WAIT", "2"), **(env or {})}
    if real_process:
        command = [str(ENTRY_POINT)] if ENTRY_POINT.exists() else [sys.executable, "-m", "mapper.app.cli"]
        return subprocess.run(command + argv, capture_output=True, text=True,
                              cwd=cwd, env=dict(os.environ, **overlay), timeout=timeout)
    from typer.testing import CliRunner

    from mapper.app.cli import app
    with contextlib.chdir(cwd) if cwd is not None else contextlib.nullcontext():
        result = CliRunner().invoke(app, argv, env=overlay, prog_name="mapper")
    if result.exception is not None and not isinstance(result.exception, SystemExit):
        raise result.exception  # a crash the entry point would print as a traceback: show it here
    return subprocess.CompletedProcess(["mapper", *argv], result.exit_code, result.stdout, result.stderr)


@pytest.fixture
def small_campaign(tmp_path: Path) -> Path:
    """Four clean tests at two levels, up and down."""
    return write_campaign(tmp_path / "campaign", [
        dict(level=30.0), dict(level=30.0, u0=60.0, step=-10.0),
        dict(level=60.0, gain=3.0), dict(level=60.0, gain=3.0, u0=60.0, step=-10.0, note="after service"),
    ])


@pytest.fixture(scope="session")
def demo_run(tmp_path_factory) -> dict:
    """`mapper demo` run once for the whole session (it is the slowest command), from a folder
    that holds the user's own store while ``$MAPPER_DB`` names another one.

    Returns the output folder, the command's result, and both stores with their bytes before
    the run, so tests can check the demo's outputs and that neither store was touched.
    """
    base = tmp_path_factory.mktemp("demo")
    campaign = write_campaign(base / "campaign", [dict(level=30.0), dict(level=60.0, gain=3.0)])
    work = base / "work"
    work.mkdir()
    own, named = work / "mapper.duckdb", base / "named.duckdb"
    for store in (own, named):
        imported = run_mapper("import", campaign, db=store)
        assert imported.returncode == 0, imported.stderr
    before = {own: own.read_bytes(), named: named.read_bytes()}
    result = run_mapper("demo", "--out", "demo_out", "--png", cwd=work, env={"MAPPER_DB": str(named)},
                        timeout=600)
    assert result.returncode == 0, result.stdout + result.stderr
    return {"out": work / "demo_out", "result": result, "work": work, "stores_before": before}
