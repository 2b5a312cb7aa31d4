"""Identification from a non-steady start, on plants simulated with scipy's ODE solver.

The plants, their textbook linearisations and the field-like recording (store by exception,
then the import's uniform grid) are in ``tests/plants.py``. Every window runs from the
previous move to the next, so all but the first start with the output still moving.
Acceptance figures are those of issue 13: gain within 5 % and time constant within 10 % of
the true local linearisation for at least 90 % of the moves held 0.8 time constants or
more; 95 % intervals covering the truth at least 90 % of the time on the linear plant; no
self-regulating move called integrating; an integrator still recognised.
"""

from __future__ import annotations

import numpy as np
import pytest
from plants import Heater, LevelLoop, LinearPlant, Tank, by_exception, move_sequence, simulate, windows

from mapper.identification.identify import identify
from mapper.store.segment import uniform_grid

SEEDS = range(6)
MOVES = 10
NOISE = 0.003  # output noise sd as a share of the typical move's response
PLANTS = {
    # name: (plant, base input, move size)
    "linear": (LinearPlant("linear", dead_time=5.0, gain=2.0, time_constant=40.0), 20.0, 4.0),
    "tank": (Tank("tank", dead_time=5.0, area=60.0, c=2.0), 20.0, 3.0),  # tau ~ 600 s at h = 100
    "heater": (Heater("heater", dead_time=5.0), 400.0, 30.0),  # tau ~ 41 s at 78 degC
}


def record(plant, base, size, seed, noise=NOISE):
    """Windows of one simulated record with their true local (gain, time constant)."""
    rng = np.random.default_rng(seed)
    times, levels, end = move_sequence(rng, plant, base, size, MOVES, first=150.0)
    td, ud, yd = simulate(plant, times, levels, end)
    sd = noise * abs(plant.local(base)[0] * size)
    ts, us, ys = by_exception(td, ud, yd, sd, rng, dead_band=sd, max_interval=10.0, period=1.0)
    t, u, y, _, flags = uniform_grid(ts - ts[0], us, ys, 1.0)
    return [(w, plant.local(0.5 * (w.u_from + w.u_to)), tuple(flags)) for w in windows(t, u, y, times)]


def fits(name, **options):
    plant, base, size = PLANTS[name]
    out = []
    for seed in SEEDS:
        for w, (gain, tau), flags in record(plant, base, size, seed):
            r = identify(w.t, w.u, w.y, preceding=w.preceding, import_flags=flags, **options)
            out.append((w, gain, tau, r))
    return out


@pytest.fixture(scope="module")
def results():
    return {name: fits(name) for name in PLANTS}


def accurate(r, gain, tau):
    return (r.gain is not None and r.time_constant is not None
            and abs(r.gain / gain - 1) <= 0.05 and abs(r.time_constant / tau - 1) <= 0.10)


@pytest.mark.parametrize("name", list(PLANTS))
def test_moves_held_long_enough_give_the_local_linearisation(results, name):
    held = [(r, gain, tau) for w, gain, tau, r in results[name] if w.hold >= 0.8 * tau]
    assert len(held) >= 30
    good = sum(accurate(r, gain, tau) for r, gain, tau in held)
    assert good >= 0.9 * len(held), f"{name}: {good}/{len(held)} within 5 % / 10 %"


def test_intervals_cover_the_truth_on_the_linear_plant(results):
    rows = results["linear"]
    covered = sum(
        r.gain_lo is not None and r.gain_lo <= gain <= r.gain_hi
        and r.time_constant_lo is not None and r.time_constant_lo <= tau <= r.time_constant_hi
        for _, gain, tau, r in rows
    )
    assert covered >= 0.9 * len(rows), f"{covered}/{len(rows)}"


@pytest.mark.parametrize("name", list(PLANTS))
def test_no_self_regulating_move_is_called_integrating(results, name):
    models = [r.model for *_, r in results[name]]
    assert "integrating" not in models
    # and with three times the noise, where the short first windows are hard to read
    plant, base, size = PLANTS[name]
    for seed in SEEDS:
        for w, _, flags in record(plant, base, size, seed, noise=3 * NOISE):
            r = identify(w.t, w.u, w.y, preceding=w.preceding)
            assert r.model != "integrating", (name, seed, w.move, r.model_evidence)


def test_a_start_still_moving_is_estimated_and_no_longer_suspect_by_itself(results):
    later = [r for w, _, _, r in results["linear"] if w.move > 0]
    assert all("start_state_estimated" in r.flags and r.start_state is not None for r in later)
    # a long, settled window started 0.6 tau after an earlier move, carrying the import flag
    plant = LinearPlant("linear", dead_time=5.0, gain=2.0, time_constant=40.0)
    td, ud, yd = simulate(plant, [376.0, 400.0], [23.0, 20.0, 24.0], 700.0)
    y = yd + np.random.default_rng(2).normal(0, NOISE * 8.0, td.size)
    first = int(np.searchsorted(td, 376.0))
    window = (td[first::4], ud[first::4], y[first::4])
    preceding = (td[:first:4], ud[:first:4])
    flags = ("next_move_before_settled",)
    new = identify(*window, preceding=preceding, import_flags=flags)
    old = identify(*window, import_flags=flags, start_state=False)
    assert new.quality == "good", new.flags
    assert old.quality != "good"


def test_without_the_start_state_the_same_moves_are_misread():
    # the comparison the issue asks for: the same windows fitted as if the plant were at rest
    plant, base, size = PLANTS["linear"]
    held_new = held_old = good_new = good_old = 0
    for seed in SEEDS[:3]:
        for w, (gain, tau), _ in record(plant, base, size, seed):
            if w.move == 0 or w.hold < 0.8 * tau:
                continue
            new = identify(w.t, w.u, w.y, preceding=w.preceding)
            old = identify(w.t, w.u, w.y, start_state=False)
            held_new += 1
            held_old += 1
            good_new += accurate(new, gain, tau)
            good_old += accurate(old, gain, tau)
    assert good_new >= 0.9 * held_new
    assert good_old <= 0.5 * held_old


def test_a_test_cut_mid_response_agrees_with_the_same_move_from_rest():
    # one move (up 4 at t = 400 s) recorded from rest, and the same move 0.6 tau after an
    # earlier move of -3 (window cut to start at that earlier move)
    plant = LinearPlant("linear", dead_time=5.0, gain=2.0, time_constant=40.0)
    rng = np.random.default_rng(11)
    sd = NOISE * 8.0
    td, ud, yd = simulate(plant, [400.0], [20.0, 24.0], 480.0)
    t_rest, u_rest = td[::4], ud[::4]
    y_rest = yd[::4] + rng.normal(0, sd, t_rest.size)
    rest = identify(t_rest[250:], u_rest[250:], y_rest[250:])
    td, ud, yd = simulate(plant, [376.0, 400.0], [23.0, 20.0, 24.0], 480.0)
    t_cut, u_cut = td[::4], ud[::4]
    y_cut = yd[::4] + rng.normal(0, sd, t_cut.size)
    first = int(np.searchsorted(t_cut, 376.0))
    cut = identify(t_cut[first:], u_cut[first:], y_cut[first:], preceding=(t_cut[:first], u_cut[:first]))
    assert "start_state_estimated" in cut.flags and "start_state_estimated" not in rest.flags
    for name in ("gain", "time_constant", "dead_time"):  # from rest, within the cut test's interval
        value = getattr(rest, name)
        lo, hi = getattr(cut, name + "_lo"), getattr(cut, name + "_hi")
        assert lo <= value <= hi, (name, value, lo, hi)


def test_a_level_loop_is_still_recognised_as_integrating():
    # A dh/dt = q - q_out with a fixed outflow: an integrator of gain 1/A (per second)
    plant = LevelLoop("level", dead_time=3.0, area=50.0, outflow=10.0)
    rng = np.random.default_rng(5)
    times = np.array([200.0, 380.0, 560.0, 740.0])
    levels = np.array([10.0, 12.0, 10.0, 8.5, 10.5])
    td, ud, yd = simulate(plant, times, levels, 900.0, x0=50.0)
    sd = 0.02
    ts, us, ys = by_exception(td, ud, yd, sd, rng, dead_band=sd, max_interval=10.0, period=1.0)
    t, u, y, _, flags = uniform_grid(ts - ts[0], us, ys, 1.0)
    for w in windows(t, u, y, times):
        r = identify(w.t, w.u, w.y, preceding=w.preceding, import_flags=flags)
        assert r.model == "integrating", (w.move, r.model_evidence)
        assert r.gain == pytest.approx(1.0 / 50.0, rel=0.02)
        assert r.model_evidence.startswith("integrating")


def _gridded(plant, times, levels, end, x0=None, seed=3, noise=0.05):
    rng = np.random.default_rng(seed)
    td, ud, yd = simulate(plant, times, levels, end, x0=x0)
    ts, us, ys = by_exception(td, ud, yd, noise, rng, dead_band=noise, max_interval=10.0, period=1.0)
    t, u, y, _, _ = uniform_grid(ts - ts[0], us, ys, 1.0)
    return t, u, y, list(np.flatnonzero(np.diff(u)) + 1)


def test_whole_record_fit_and_the_test_of_nonlinearity():
    from mapper.identification.record import fit_record

    # linear plant: one model explains the record, and the local models agree
    plant = LinearPlant("linear", dead_time=5.0, gain=2.0, time_constant=40.0)
    times = np.array([150.0, 200.0, 250.0, 300.0, 350.0, 400.0])
    levels = np.array([20.0, 23.0, 19.0, 22.0, 18.0, 21.0, 24.0])
    t, u, y, starts = _gridded(plant, times, levels, 460.0)
    linear = fit_record(t, u, y, starts)
    assert len(linear.local) == len(times)
    assert linear.whole.gain == pytest.approx(2.0, rel=0.03)
    assert linear.whole.time_constant == pytest.approx(40.0, rel=0.05)
    assert not linear.differ, linear.p_value
    # tank over a wide range of levels (K and tau grow as sqrt(h)): the local models differ
    tank = Tank("tank", dead_time=5.0, area=10.0, c=2.0)
    times = np.array([300.0, 500.0, 700.0, 900.0])
    levels = np.array([10.0, 14.0, 18.0, 13.0, 8.0])
    t, u, y, starts = _gridded(tank, times, levels, 1100.0, noise=0.02)
    nonlinear = fit_record(t, u, y, starts)
    assert nonlinear.differ, nonlinear.p_value


def test_fitting_a_store_simulates_each_window_over_the_record_before_it(tmp_path):
    """``mapper fit`` hands every window of a long log its preceding record.

    The linear plant's record (moves 0.5-1.5 time constants apart, stored by exception) is
    written as one file, imported, and fitted through the store. Each stored fit must be
    the fit of its window with the store's own preceding record (the one-query reference,
    ``Store.preceding_record``), and at least 90 % of the moves held 0.8 time constants or
    more must come back within 5 % in gain and 10 % in time constant of the truth (issue 13).
    """
    from mapper.identification.fitting import fit_store
    from mapper.store.database import Store
    from mapper.store.ingest import import_sources

    plant, base, size = PLANTS["linear"]
    rng = np.random.default_rng(11)
    times, levels, end = move_sequence(rng, plant, base, size, MOVES, first=150.0)
    td, ud, yd = simulate(plant, times, levels, end)
    sd = NOISE * abs(plant.local(base)[0] * size)
    ts, us, ys = by_exception(td, ud, yd, sd, rng, dead_band=sd, max_interval=10.0, period=1.0)
    path = tmp_path / "log.csv"
    np.savetxt(path, np.column_stack([ts - ts[0], us, ys]), delimiter=",", header="time,valve,flow",
               comments="", fmt="%.9g")
    with Store(tmp_path / "s.duckdb") as store:
        import_sources(store, [path], time_column="time", input_column="valve", output_column="flow",
                       period=1.0, campaign="log")
        summary = fit_store(store, workers=1)
        ids = store.test_ids()
        assert summary.fitted == len(ids) == MOVES
        stored = store.params(campaign="log").set_index("test_id")
        held, good = 0, 0
        for i, test_id in enumerate(ids):
            t, u, y = store.samples(test_id)
            before_t, before_u, _ = store.preceding_record(test_id)
            assert (before_t.size == 0) == (i == 0)
            expected = identify(t, u, y, preceding=(before_t, before_u) if before_t.size else None)
            row = stored.loc[test_id]
            assert row["gain"] == pytest.approx(expected.gain, rel=1e-9)
            assert row["time_constant"] == pytest.approx(expected.time_constant, rel=1e-9)
            hold = (times[i + 1] if i + 1 < MOVES else end) - times[i]
            gain, tau = plant.local(0.5 * (levels[i] + levels[i + 1]))
            if hold >= 0.8 * tau:
                held += 1
                good += abs(row["gain"] / gain - 1) <= 0.05 and abs(row["time_constant"] / tau - 1) <= 0.10
        assert held >= 5 and good >= 0.9 * held, (good, held)


def test_an_earlier_move_still_in_its_dead_time_is_simulated_not_mistaken():
    """The window starts 12 s after an earlier move on a plant with a 20 s dead time, and
    its own move comes 8 s in: the earlier move's whole response arrives inside the window.

    Truth: the linear plant simulated by scipy's ODE solver (gain 2, time constant 40 s,
    dead time 20 s). With the preceding record the fit must find it (gain within 2 %,
    time constant within 5 %, dead time within one sample); fitted from the window alone
    the earlier response is taken for this move's and the gain is far off.
    """
    plant = LinearPlant("linear", dead_time=20.0, gain=2.0, time_constant=40.0)
    td, ud, yd = simulate(plant, [188.0, 208.0], [50.0, 55.0, 45.0], 600.0)
    t, u, y = td[::4], ud[::4], yd[::4] + np.random.default_rng(2).normal(0.0, 0.02, td[::4].size)
    window = t >= 200.0
    t_w, before_t = t[window] - 200.0, t[~window] - 200.0
    fit = identify(t_w, u[window], y[window], preceding=(before_t, u[~window]))
    assert fit.gain == pytest.approx(2.0, rel=0.02)
    assert fit.time_constant == pytest.approx(40.0, rel=0.05)
    assert fit.dead_time == pytest.approx(20.0, abs=1.0)
    alone = identify(t_w, u[window], y[window])
    assert abs(alone.gain / 2.0 - 1.0) > 0.2, alone.gain


@pytest.mark.parametrize("name, differ", [("linear", False), ("tank", True)])
def test_record_fit_command_puts_a_logged_file_back_together(tmp_path, name, differ):
    """``mapper record-fit FILE`` rebuilds the file's record from its stored tests and gives the
    same whole-record fit as the library on the record itself; the linear plant's moves agree,
    the tank's (gain and time constant growing as the square root of the level) differ."""
    import json

    from conftest import run_mapper

    from mapper.identification.record import fit_record

    if name == "linear":
        plant, noise = LinearPlant("linear", dead_time=5.0, gain=2.0, time_constant=40.0), 0.05
        times, levels, end = [150.0, 250.0, 350.0, 450.0, 550.0], [20.0, 23.0, 19.0, 22.0, 18.0, 21.0], 650.0
    else:
        plant, noise = Tank("tank", dead_time=5.0, area=10.0, c=2.0), 0.02
        times, levels, end = [300.0, 500.0, 700.0, 900.0], [10.0, 14.0, 18.0, 13.0, 8.0], 1100.0
    td, ud, yd = simulate(plant, times, levels, end)
    pick = np.arange(0, td.size, 4)  # every second
    t, u = td[pick], ud[pick]
    y = yd[pick] + np.random.default_rng(5).normal(0.0, noise, pick.size)
    path = tmp_path / "unit_log.csv"
    np.savetxt(path, np.column_stack([t, u, y]), delimiter=",", header="time,valve,level", comments="", fmt="%.9g")
    db = tmp_path / "s.duckdb"
    done = run_mapper("import", path, "--time", "time", "--input", "valve", "--output", "level",
                      "--campaign", "log", db=db)
    assert done.returncode == 0, done.stderr
    shown = run_mapper("record-fit", "unit_log.csv", "--format", "json", db=db)
    assert shown.returncode == 0, shown.stderr
    result = json.loads(shown.stdout)
    assert [row["move"] for row in result["local"]] == list(range(1, len(times) + 1))
    assert result["homogeneity"]["local_models_differ"] is differ
    reference = fit_record(t, u, y, [int(np.searchsorted(t, m)) for m in times])
    assert result["whole_record"]["gain"] == pytest.approx(reference.whole.gain, rel=0.02)
    assert [row["gain"] for row in result["local"]] == pytest.approx([r.gain for r in reference.local], rel=0.02)
    if name == "linear":
        assert result["whole_record"]["gain"] == pytest.approx(2.0, rel=0.03)
    table = run_mapper("record-fit", "unit_log.csv", db=db)
    assert table.returncode == 0 and "one model across the record" in table.stdout
    assert ("differ beyond their intervals" in table.stdout) is differ
    missing = run_mapper("record-fit", "other.csv", db=db)
    assert missing.returncode == 1 and "unit_log.csv" in missing.stderr


def _store_fits(tmp_path, plant, base, size, seeds):
    """Each seeded record written as one file, imported and fitted through the store; the
    stored rows with each move's hold and true local (gain, time constant)."""
    from mapper.identification.fitting import fit_store
    from mapper.store.database import Store
    from mapper.store.ingest import import_sources

    tmp_path.mkdir(parents=True, exist_ok=True)
    paths, truth = [], []
    for seed in seeds:
        rng = np.random.default_rng(seed)
        times, levels, end = move_sequence(rng, plant, base, size, MOVES, first=150.0)
        td, ud, yd = simulate(plant, times, levels, end)
        sd = NOISE * abs(plant.local(base)[0] * size)
        ts, us, ys = by_exception(td, ud, yd, sd, rng, dead_band=sd, max_interval=10.0, period=1.0)
        path = tmp_path / f"log_{seed}.csv"
        np.savetxt(path, np.column_stack([ts - ts[0], us, ys]), delimiter=",", header="time,valve,flow",
                   comments="", fmt="%.9g")
        paths.append(path)
        truth += [((times[i + 1] if i + 1 < MOVES else end) - times[i], plant.local(0.5 * (levels[i] + levels[i + 1])))
                  for i in range(MOVES)]
    with Store(tmp_path / "s.duckdb") as store:
        import_sources(store, paths, time_column="time", input_column="valve", output_column="flow",
                       period=1.0, campaign="logs")
        fit_store(store, workers=1)
        rows = store.params(campaign="logs").sort_values("test_id").to_dict("records")
    assert len(rows) == len(truth)
    return list(zip(rows, truth))


def test_moves_cut_short_by_the_next_move_are_rejected_not_misread(tmp_path):
    """A dead time of 20 s with moves 0.5-1.5 time constants (20-60 s) apart: some moves are
    followed by the next before their own response shows. Judged against the other moves of
    their file, those come back rejected (``response_cut_by_next_move``) instead of as a
    gain of the wrong sign; no kept move is more than 25 % off in gain, and no move within
    5 % / 10 % of the truth is rejected by the judgement (truth: the linear plant simulated
    by scipy's ODE solver)."""
    plant = LinearPlant("linear", dead_time=20.0, gain=2.0, time_constant=40.0)
    results = _store_fits(tmp_path, plant, 20.0, 4.0, range(6))
    cut = [row for row, _ in results if "response_cut_by_next_move" in (row["flags"] or [])]
    assert cut and all(row["quality"] == "rejected" for row in cut)
    for row, (_, (gain, tau)) in results:
        if row["quality"] != "rejected":
            assert abs(row["gain"] / gain - 1) <= 0.25, row
        judged = {"response_cut_by_next_move", "gain_sign_against_file"} & set(row["flags"] or [])
        if judged:
            assert not accurate(_Fit(row), gain, tau), row
    # the plants of the acceptance checks (dead time 5 s) lose no move to the judgement
    for name in ("linear", "heater"):
        plant, base, size = PLANTS[name]
        rows = _store_fits(tmp_path / name, plant, base, size, range(3))
        assert not any({"response_cut_by_next_move", "gain_sign_against_file"} & set(row["flags"] or [])
                       for row, _ in rows), name


class _Fit:
    def __init__(self, row):
        self.gain, self.time_constant = row["gain"], row["time_constant"]
