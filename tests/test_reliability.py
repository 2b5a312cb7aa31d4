"""Reliability through the real ``mapper`` entry point: bad input, kills, concurrent use.

What is proved here (issue 9):

1. every faulty file of :mod:`fault_corpus` is refused with exit status 1, one message
   naming the file (line, column and value where they apply) and a ``hint:`` line, no
   traceback, and the store's contents exactly as they were; common export quirks are
   read to the same numbers as the clean file;
2. ``mapper import`` and ``mapper fit`` killed with SIGKILL at random moments leave a store
   that opens and holds only whole tests and fits, and a re-run finishes the job;
3. a second writer gets "store in use" (bounded wait), readers see whole states only;
4. a file that is not a store, and the user's own store during ``mapper demo``, are left
   byte-for-byte unchanged;
5. no SQL is built from file content (a scan of the package source);
6. numerically hard tests are fitted without failing and marked rejected/suspect.
"""

from __future__ import annotations

import ast
import json
import os
import random
import re
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pytest

from conftest import ENTRY_POINT, run_mapper, write_campaign
from fault_corpus import FAULTS, ODD_EXPORTS, clean_frame, csv_text
from mapper import columns
from mapper.store.ingest import read_signals
from mapper.store.database import Store

PACKAGE = Path(__file__).resolve().parents[1] / "mapper"
TABLES = ("mapper_meta", "campaigns", "tests", "samples", "fits")


def snapshot(db: Path) -> dict[str, list[tuple]]:
    """Every row of every table except time stamps, read with the plain duckdb client."""
    with duckdb.connect(str(db), read_only=True) as con:
        out = {}
        for table in TABLES:
            columns = [r[0] for r in con.execute(f"DESCRIBE {table}").fetchall()
                       if r[0] not in ("imported_at", "fitted_at", "created_at")]
            out[table] = sorted(map(repr, con.execute(
                "SELECT " + ", ".join(f'"{c}"' for c in columns) + f" FROM {table}").fetchall()))
    return out


def store_is_whole(db: Path) -> dict[str, int]:
    """Check the invariants a store keeps after any interruption; return its counts."""
    with Store(db, read_only=True) as store:  # opens through mapper's own checks
        counts = store.counts()
    with duckdb.connect(str(db), read_only=True) as con:
        torn = con.execute(
            "SELECT count(*) FROM tests t WHERE t.n_samples <> "
            "(SELECT count(*) FROM samples s WHERE s.test_id = t.test_id)").fetchone()[0]
        orphans = con.execute(
            "SELECT count(*) FROM samples WHERE test_id NOT IN (SELECT test_id FROM tests)").fetchone()[0]
        orphan_fits = con.execute(
            "SELECT count(*) FROM fits WHERE test_id NOT IN (SELECT test_id FROM tests)").fetchone()[0]
        half_fits = con.execute(
            "SELECT count(*) FROM fits WHERE quality IS NULL OR method IS NULL").fetchone()[0]
        gaps = con.execute(
            "SELECT count(*) FROM (SELECT test_id, max(sample_index) + 1 AS top, count(*) AS n "
            "FROM samples GROUP BY test_id) WHERE top <> n").fetchone()[0]
    assert (torn, orphans, orphan_fits, half_fits, gaps) == (0, 0, 0, 0, 0)
    return counts


# -- 1. the fault corpus ------------------------------------------------------------------
@pytest.fixture(scope="module")
def base_store(tmp_path_factory) -> Path:
    """A store holding a small clean campaign, copied by each test that needs one."""
    folder = tmp_path_factory.mktemp("base")
    campaign = write_campaign(folder / "campaign", [dict(level=30.0), dict(level=60.0, gain=3.0)])
    db = folder / "base.duckdb"
    result = run_mapper("import", campaign, db=db)
    assert result.returncode == 0, result.stderr
    return db


def test_corpus_is_large_and_distinct():
    from test_import import BAD_FILES, CAMPAIGN_FAULTS
    names = [f.name for f in FAULTS]
    kinds = {kind: sum(f.kind == kind for f in FAULTS) for kind in ("csv", "parquet", "campaign")}
    assert len(set(names)) == len(names) >= 25
    assert min(kinds.values()) >= 8, kinds
    assert not set(names) & (set(BAD_FILES) | set(CAMPAIGN_FAULTS))


@pytest.mark.parametrize("fault", FAULTS, ids=[f.name for f in FAULTS])
def test_fault_refused_cleanly_and_store_unchanged(tmp_path, base_store, fault):
    db = tmp_path / "store.duckdb"
    shutil.copy(base_store, db)
    before = snapshot(db)
    folder = tmp_path / "input"
    folder.mkdir()
    args = fault.build(folder)
    result = run_mapper("import", *args, db=db)
    said = result.stdout + result.stderr
    assert result.returncode == 1, said
    assert "Traceback" not in said and "internal error" not in said, said
    assert said.count("hint:") == 1, said
    lines = [line for line in said.splitlines()
             if fault.culprit in line and not line.strip().startswith("hint:")]
    assert len(lines) == 1, said  # one message, naming the file
    for fragment in fault.expect:
        assert fragment in said, (fragment, said)
    assert snapshot(db) == before


@pytest.mark.parametrize("quirk", sorted(ODD_EXPORTS))
def test_common_export_quirks_read_as_the_clean_file(tmp_path, quirk):
    frame = clean_frame()
    clean = tmp_path / "clean.csv"
    clean.write_text(csv_text(frame))
    odd = tmp_path / "odd.csv"
    odd.write_bytes(ODD_EXPORTS[quirk](frame))
    expected = read_signals(clean, "t_s", "valve_pct", "level_cm")
    seen = read_signals(odd, "t_s", "valve_pct", "level_cm")
    for name in ("t", "u", "y"):
        np.testing.assert_array_equal(getattr(seen, name), getattr(expected, name))


def test_semicolon_export_starting_on_whole_numbers(tmp_path):
    """Decimal commas are recognised even when the first rows hold whole numbers only."""
    frame = clean_frame()
    frame["t_s"] = frame["t_s"] / 2  # 0; 0,5; 1; 1,5 ...
    frame.loc[:5, "level_cm"] = 20.0
    odd = tmp_path / "odd.csv"
    odd.write_bytes(ODD_EXPORTS["semicolon delimiter with decimal commas"](frame))
    seen = read_signals(odd, "t_s", "valve_pct", "level_cm")
    np.testing.assert_array_equal(seen.t, frame["t_s"].to_numpy())
    np.testing.assert_array_equal(seen.y, frame["level_cm"].to_numpy())


def test_quirky_campaign_imports_the_same_samples(tmp_path):
    folder = tmp_path / "quirky"
    folder.mkdir()
    frame = clean_frame()
    text = 'name = "Quirks"\n[columns]\ntime = "t_s"\ninput = "valve_pct"\noutput = "level_cm"\n'
    (folder / "clean.csv").write_text(csv_text(frame))
    text += '[[tests]]\nfile = "clean.csv"\n'
    for i, quirk in enumerate(sorted(ODD_EXPORTS)):
        (folder / f"odd_{i}.csv").write_bytes(ODD_EXPORTS[quirk](frame))
        text += f'[[tests]]\nfile = "odd_{i}.csv"\n'
    (folder / "campaign.toml").write_text(text)
    db = tmp_path / "s.duckdb"
    result = run_mapper("import", folder, db=db)
    assert result.returncode == 0, result.stdout + result.stderr
    with Store(db, read_only=True) as store:
        ids = store.test_ids()
        assert len(ids) == 1 + len(ODD_EXPORTS)
        reference = store.samples(ids[0])
        for test_id in ids[1:]:
            for seen, expected in zip(store.samples(test_id), reference):
                np.testing.assert_array_equal(seen, expected)


# -- 2. interrupted writes ---------------------------------------------------------------
N_FILES = 160  # import writes files in batches: enough files for several batches
IMPORT_TRIALS = 8
EARLY_TRIALS = 24
FIT_TRIALS = 5


def _command(db: Path, *args) -> list[str]:
    head = [str(ENTRY_POINT)] if ENTRY_POINT.exists() else [sys.executable, "-m", "mapper.app.cli"]
    return head + ["--db", str(db), *map(str, args)]


def _kill_after(command: list[str], delay: float, watch: Path | None = None) -> int | None:
    """Start ``command``, SIGKILL it ``delay`` s after start (or after ``watch`` appears).

    Returns the exit status when the command finished before the kill, else None.
    """
    env = dict(os.environ, MAPPER_LOCK_WAIT="5")
    process = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                               env=env, start_new_session=True)
    try:
        if watch is not None:  # the write-ahead log shows that writing has begun
            limit = time.monotonic() + 60
            while not watch.exists() and process.poll() is None and time.monotonic() < limit:
                time.sleep(0.01)
        time.sleep(delay)
        finished = process.poll()
        if finished is None:
            process.send_signal(signal.SIGKILL)
        process.wait(timeout=60)
        return finished
    finally:
        try:  # pool workers started by this command share its session; end them too
            os.killpg(process.pid, signal.SIGKILL)
        except (ProcessLookupError, PermissionError):
            pass


@pytest.fixture(scope="module")
def big_campaign(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("big")
    return write_campaign(folder / "campaign", [
        dict(level=10.0 + i, duration=120.0, step_time=20.0, gain=1.0 + 0.05 * i) for i in range(N_FILES)])


@pytest.fixture(scope="module")
def clean_run(tmp_path_factory, big_campaign) -> dict:
    """The reference: an uninterrupted import and fit of the big campaign."""
    db = tmp_path_factory.mktemp("clean") / "clean.duckdb"
    assert run_mapper("import", big_campaign, db=db).returncode == 0
    imported = snapshot(db)
    template = db.with_name("imported.duckdb")
    shutil.copy(db, template)
    fitted = run_mapper("fit", db=db)
    assert fitted.returncode == 0, fitted.stderr
    with duckdb.connect(str(db), read_only=True) as con:
        params = con.execute("SELECT file, level, gain, time_constant, dead_time, quality "
                             "FROM test_params ORDER BY file").fetchall()
    return {"imported": imported, "template": template, "params": params,
            "counts": store_is_whole(db)}


def _kill_at_batch(command: list[str], extra_delay: float, pause: float) -> int | None:
    """Start ``command`` with the between-batches pause, kill it once a batch has committed.

    The import announces each committed batch on stderr and then holds ``pause`` seconds
    (a test-only hook), so a kill ``extra_delay < pause`` after the announcement lands,
    on any machine speed, with some files stored and others not yet; a larger delay lands
    among the following writes. Returns the exit status if the command ended first.
    """
    env = dict(os.environ, MAPPER_LOCK_WAIT="5", MAPPER_TEST_PAUSE_AFTER_BATCH=str(pause))
    process = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True,
                               env=env, start_new_session=True)
    try:
        for line in process.stderr:
            if "batch committed" in line:
                break
        time.sleep(extra_delay)
        finished = process.poll()
        if finished is None:
            process.send_signal(signal.SIGKILL)
        process.wait(timeout=60)
        return finished
    finally:
        process.stderr.close()
        try:
            os.killpg(process.pid, signal.SIGKILL)
        except (ProcessLookupError, PermissionError):
            pass


def _check_recovers(db: Path, big_campaign: Path, clean_run: dict, trial) -> None:
    again = run_mapper("import", big_campaign, db=db)
    assert again.returncode == 0, (trial, again.stdout, again.stderr)
    assert store_is_whole(db)["tests"] == N_FILES
    final = snapshot(db)
    for table in ("campaigns", "samples", "mapper_meta"):
        assert final[table] == clean_run["imported"][table], (trial, table)


@pytest.mark.slow
def test_import_killed_between_and_during_batches_loses_nothing(tmp_path, big_campaign, clean_run):
    rng = random.Random(20260304)
    pause = 1.0
    for trial in range(IMPORT_TRIALS):
        db = tmp_path / f"kill_{trial}.duckdb"
        # even trials: killed inside the pause, between two committed batches (always
        # mid-import); odd trials: killed after the pause, among the next batch's writes
        between = trial % 2 == 0
        delay = rng.uniform(0.05, 0.5 * pause) if between else pause + rng.uniform(0.0, 0.3)
        finished = _kill_at_batch(_command(db, "import", big_campaign), delay, pause)
        counts = store_is_whole(db)
        if between:
            assert finished is None, trial
            assert 0 < counts["tests"] < N_FILES, (trial, counts)
        _check_recovers(db, big_campaign, clean_run, trial)


@pytest.mark.slow
def test_import_killed_in_its_first_second_never_bricks_the_store(tmp_path, big_campaign, clean_run):
    """Kills during start-up and store creation leave no store or a whole one (issue: an
    empty DuckDB file left by a kill between creating the file and committing its schema)."""
    rng = random.Random(11)
    aimed_at_creation = 0
    for trial in range(EARLY_TRIALS):
        db = tmp_path / f"early_{trial}.duckdb"
        if trial % 2:  # anywhere in the first second
            _kill_after(_command(db, "import", big_campaign), rng.uniform(0.0, 1.0))
        else:  # the moment the store is being built: poll for its temporary file every ms
            aimed_at_creation += _kill_while_creating(_command(db, "import", big_campaign), db,
                                                      rng.uniform(0.0, 0.005))
        if db.exists():
            store_is_whole(db)  # opens through mapper's own checks: never "not a mapper store"
        _check_recovers(db, big_campaign, clean_run, trial)
    assert aimed_at_creation >= 1  # at least one kill landed while the store was being built


def _kill_while_creating(command: list[str], db: Path, delay: float) -> int:
    """Kill ``command`` ``delay`` s after its temporary store file appears; 1 if it did."""
    process = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                               start_new_session=True)
    partial = db.with_name(f".{db.name}.creating-{process.pid}")
    seen = 0
    limit = time.monotonic() + 60
    while process.poll() is None and time.monotonic() < limit:
        if partial.exists():
            seen = 1
            time.sleep(delay)
            break
        time.sleep(0.001)
    try:
        os.killpg(process.pid, signal.SIGKILL)
    except (ProcessLookupError, PermissionError):
        pass
    process.wait(timeout=60)
    return seen


@pytest.mark.slow
def test_fit_killed_at_random_moments_loses_nothing(tmp_path, clean_run):
    rng = random.Random(7)
    for trial in range(FIT_TRIALS):
        db = tmp_path / f"fit_{trial}.duckdb"
        shutil.copy(clean_run["template"], db)
        _kill_after(_command(db, "fit"), rng.uniform(0.5, 5.0))
        counts = store_is_whole(db)
        assert counts["tests"] == N_FILES and counts["fits"] <= N_FILES
        again = run_mapper("fit", db=db)
        assert again.returncode == 0, (trial, again.stderr)
        assert store_is_whole(db) == clean_run["counts"]
        with duckdb.connect(str(db), read_only=True) as con:
            params = con.execute("SELECT file, level, gain, time_constant, dead_time, quality "
                                 "FROM test_params ORDER BY file").fetchall()
        assert [p[0] for p in params] == [p[0] for p in clean_run["params"]]
        assert [p[5] for p in params] == [p[5] for p in clean_run["params"]]
        np.testing.assert_allclose(np.array([p[1:5] for p in params], dtype=float),
                                   np.array([p[1:5] for p in clean_run["params"]], dtype=float),
                                   rtol=1e-9, equal_nan=True)


# -- 3. concurrent use ------------------------------------------------------------------
def _hold(db: Path, read_only: bool) -> subprocess.Popen:
    code = ("import sys, time; from mapper.store.database import Store; "
            f"s = Store(sys.argv[1], read_only={read_only}); print('ready', flush=True); time.sleep(120)")
    holder = subprocess.Popen([sys.executable, "-c", code, str(db)], stdout=subprocess.PIPE, text=True,
                              cwd=str(PACKAGE.parent))
    assert holder.stdout.readline().strip() == "ready"
    return holder


def _release(holder: subprocess.Popen) -> None:
    holder.kill()
    holder.wait(timeout=30)


def test_second_writer_gets_store_in_use(tmp_path, base_store, small_campaign):
    db = tmp_path / "store.duckdb"
    shutil.copy(base_store, db)
    before = snapshot(db)
    holder = _hold(db, read_only=False)
    try:
        writer = run_mapper("import", small_campaign, db=db, env={"MAPPER_LOCK_WAIT": "1"})
        reader = run_mapper("params", db=db, env={"MAPPER_LOCK_WAIT": "1"})
    finally:
        _release(holder)
    for result in (writer, reader):
        assert result.returncode == 1
        assert "store in use" in result.stderr and "hint:" in result.stderr
        assert "MAPPER_LOCK_WAIT" in result.stderr
        assert "Traceback" not in result.stderr
    assert snapshot(db) == before
    store_is_whole(db)
    assert run_mapper("import", small_campaign, db=db).returncode == 0


def test_readers_share_and_writer_waits_for_them(tmp_path, base_store, small_campaign):
    db = tmp_path / "store.duckdb"
    shutil.copy(base_store, db)
    alone = run_mapper("params", "--format", "json", db=db)
    holder = _hold(db, read_only=True)
    try:
        shared = run_mapper("params", "--format", "json", db=db, env={"MAPPER_LOCK_WAIT": "1"})
        writer = run_mapper("import", small_campaign, db=db, env={"MAPPER_LOCK_WAIT": "1"})
    finally:
        _release(holder)
    assert shared.returncode == 0 and json.loads(shared.stdout) == json.loads(alone.stdout)
    assert writer.returncode == 1 and "store in use" in writer.stderr


def test_readers_during_an_import_see_before_or_after(tmp_path, base_store, big_campaign):
    db = tmp_path / "store.duckdb"
    shutil.copy(base_store, db)
    before = json.loads(run_mapper("params", "--format", "json", db=db).stdout)
    importer = subprocess.Popen(_command(db, "import", big_campaign), stdout=subprocess.DEVNULL,
                                stderr=subprocess.DEVNULL)
    answers = []
    try:
        while importer.poll() is None and len(answers) < 6:
            answers.append(run_mapper("params", "--format", "json", db=db, env={"MAPPER_LOCK_WAIT": "0"}))
    finally:
        assert importer.wait(timeout=120) == 0
    after = json.loads(run_mapper("params", "--format", "json", db=db).stdout)
    assert len(after) == len(before) + N_FILES
    answers.append(run_mapper("params", "--format", "json", db=db))
    for answer in answers:
        if answer.returncode == 1:
            assert "store in use" in answer.stderr and "Traceback" not in answer.stderr
        else:
            assert json.loads(answer.stdout) in (before, after)


# -- 4. someone else's file is never damaged -----------------------------------------------
@pytest.mark.parametrize("content", [b"", b"\x00" * 4096, b"DUCK" * 100, b"PAR1 not a store"])
def test_odd_files_given_as_store_are_untouched(tmp_path, small_campaign, content):
    foreign = tmp_path / "theirs.db"
    foreign.write_bytes(content)
    result = run_mapper("import", small_campaign, db=foreign)
    said = result.stdout + result.stderr
    assert result.returncode == 1 and "not a mapper store" in result.stderr, said
    assert "Traceback" not in said
    assert foreign.read_bytes() == content


# -- 5. nothing from a file is executed or interpreted -------------------------------------
def _formatted_names(node: ast.AST) -> set[str]:
    return {n.id for n in ast.walk(node) if isinstance(n, ast.Name)}


# Names allowed inside SQL text built with an f-string or "+": each is checked below to hold
# constants or column names already matched against a file's header or a fixed tuple.
# (`names` in save_fits joins the columns of a frame built with constant keys only).
SQL_PIECES = {"statement", "sql", "where", "relation_sql", "column_sql", "names", "FIT_VALUE_COLUMNS"}


def test_sql_is_never_built_from_values():
    checked = 0
    for source in sorted(PACKAGE.rglob("*.py")):
        tree = ast.parse(source.read_text(), filename=str(source))
        for call in ast.walk(tree):
            if not (isinstance(call, ast.Call) and isinstance(call.func, ast.Attribute)
                    and call.func.attr in ("execute", "sql", "query") and call.args):
                continue
            first = call.args[0]
            checked += 1
            if isinstance(first, ast.Constant):
                continue
            assert not (isinstance(first, ast.BinOp) and isinstance(first.op, ast.Mod)), \
                f"{source.name}:{call.lineno} builds SQL with %"
            assert not (isinstance(first, ast.Call) and getattr(first.func, "attr", "") == "format"), \
                f"{source.name}:{call.lineno} builds SQL with .format"
            loose = _formatted_names(first) - SQL_PIECES - {"len"}
            assert not loose, f"{source.name}:{call.lineno} puts {sorted(loose)} into SQL text"
    assert checked >= 20
    schema = ast.parse((PACKAGE / "store" / "schema.py").read_text())
    # `statement` walks the constant schema list: every element a plain string constant
    listed = [node.value for node in ast.walk(schema) if isinstance(node, ast.Assign)
              and any(getattr(target, "id", "") == "SCHEMA" for target in node.targets)]
    # ...or a statement generated from the column registry, whose names are plain identifiers
    generated = {"_fits_table_sql", "_view_sql"}
    assert listed and all(isinstance(e, ast.Constant) or (isinstance(e, ast.Call) and e.func.id in generated)
                          for e in listed[0].elts)
    registered = (*columns.FIT_VALUE_COLUMNS, *columns.FIT_LIST_COLUMNS, *columns.TEST_PARAMS_COLUMNS)
    assert all(re.fullmatch(r"[a-z][a-z0-9_]*", c.name) for c in registered)
    store = (PACKAGE / "store" / "readers.py").read_text()
    # the only interpolated pieces: constant reader options and header-checked column names
    assert "column names with double quotes are not supported" in store
    assert "read_csv(?{options})" in store


def test_hostile_text_in_files_is_stored_as_text(tmp_path):
    """SQL and shell text in a note or column name is data, never run."""
    folder = write_campaign(tmp_path / "c", [dict()])
    with (folder / "campaign.toml").open("a") as handle:
        handle.write('note = "x\'); DROP TABLE tests; --"\n')
    frame = clean_frame().rename(columns={"level_cm": "y'); DROP TABLE samples; --"})
    frame.to_csv(folder / "evil.csv", index=False)
    db = tmp_path / "s.duckdb"
    assert run_mapper("import", folder, db=db).returncode == 0
    evil = run_mapper("import", folder / "evil.csv", "--time", "t_s", "--input", "valve_pct",
                      "--output", "y'); DROP TABLE samples; --", db=db)
    assert evil.returncode == 0, evil.stdout + evil.stderr
    with duckdb.connect(str(db), read_only=True) as con:
        notes = con.execute("SELECT note FROM tests ORDER BY test_id").fetchall()
        assert con.execute("SELECT count(*) FROM samples").fetchone()[0] == 200 + len(frame)
    assert notes[0][0] == "x'); DROP TABLE tests; --"
    quoted = tmp_path / "quoted.csv"
    clean_frame().rename(columns={"level_cm": 'y" FROM tests; --'}).to_csv(quoted, index=False)
    refused = run_mapper("import", quoted, "--time", "t_s", "--input", "valve_pct",
                         "--output", 'y" FROM tests; --', db=db)
    assert refused.returncode == 1 and "double quotes" in refused.stdout + refused.stderr
    assert "Traceback" not in refused.stderr


# -- 6. numerically hard tests are judged, not crashed on ----------------------------------
def _fopdt(t, gain, time_constant, dead_time, step_time, step):
    # exact first-order-plus-dead-time step response (textbook formula)
    elapsed = np.clip(t - step_time - dead_time, 0, None)
    return gain * step * (1 - np.exp(-elapsed / time_constant))


def test_hard_tests_fit_and_are_marked(tmp_path):
    rng = np.random.default_rng(11)
    t = np.arange(0.0, 200.0)
    u = np.where(t >= 40, 60.0, 50.0)
    late = np.where(t >= 195, 60.0, 50.0)
    hard = {
        "flat_response": (t, u, 20 + rng.normal(0, 0.05, t.size)),
        "far_below_noise": (t, u, 20 + _fopdt(t, 0.01, 10, 3, 40, 10) + rng.normal(0, 1.0, t.size)),
        "step_at_the_end": (t, late, 20 + _fopdt(t, 2, 10, 3, 195, 10) + rng.normal(0, 0.02, t.size)),
        "dead_time_beyond_record": (t, u, 20 + _fopdt(t, 2, 10, 300, 40, 10) + rng.normal(0, 0.02, t.size)),
    }
    # the same dimensionless test (tau = 20 periods, theta = 6 periods) at three time scales
    clean = rng.normal(0, 0.02, t.size)
    scales = {"scale_tiny": 1e-4, "scale_unit": 1.0, "scale_huge": 500.0}
    for name, period in scales.items():
        hard[name] = (t * period, u, 20 + _fopdt(t, 2, 20, 6, 40, 10) + clean)
    folder = tmp_path / "hard"
    folder.mkdir()
    text = 'name = "Hard"\n[columns]\ntime = "t"\ninput = "u"\noutput = "y"\n'
    for name, (tt, uu, yy) in hard.items():
        pd.DataFrame({"t": tt, "u": uu, "y": yy}).to_csv(folder / f"{name}.csv", index=False)
        text += f'[[tests]]\nfile = "{name}.csv"\n'
    (folder / "campaign.toml").write_text(text)
    db = tmp_path / "s.duckdb"
    assert run_mapper("import", folder, db=db).returncode == 0
    fitted = run_mapper("fit", db=db)
    assert fitted.returncode == 0 and "Traceback" not in fitted.stderr, fitted.stderr
    rows = {r["file"][:-4]: r for r in json.loads(run_mapper("params", "--format", "json", db=db).stdout)}
    for name in ("flat_response", "far_below_noise", "step_at_the_end", "dead_time_beyond_record"):
        assert rows[name]["quality"] in ("rejected", "suspect"), rows[name]
        assert rows[name]["flags"], rows[name]
    for name, period in scales.items():
        row = rows[name]
        assert row["quality"] == rows["scale_unit"]["quality"], (name, row)
        assert row["gain"] == pytest.approx(2.0, rel=0.02)
        assert row["time_constant"] / period == pytest.approx(20.0, rel=0.05)
        assert abs(row["dead_time"] / period - 6.0) <= 1.0  # within one sample period
