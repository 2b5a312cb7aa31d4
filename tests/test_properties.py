"""Property tests: random bytes and random tables at the reader, random arrays at the fitter.

Whatever comes in, the answer is a checked result or a :class:`mapper.errors.MapperError`
(which the command line turns into one message and exit status 1), never another
exception. A result that comes back keeps the reader's promises: finite values, time
strictly increasing from zero, at least ``MIN_FILE_SAMPLES`` samples.
"""

from __future__ import annotations

import math
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from mapper.errors import MapperError
from mapper.store.ingest import read_signals
from mapper.constants import MIN_FILE_SAMPLES
from mapper.store.segment import split_signals

SETTINGS = settings(max_examples=150, deadline=None, derandomize=True,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
COLUMNS = ("t", "u", "y")


def _check_signals(signals) -> None:
    assert len(signals.t) == len(signals.u) == len(signals.y) >= MIN_FILE_SAMPLES
    for values in (signals.t, signals.u, signals.y):
        assert np.isfinite(values).all()
    assert signals.t[0] == 0 and (np.diff(signals.t) > 0).all()
    assert np.ptp(signals.u) > 0 and np.ptp(signals.y) > 0


def _read(path: Path):
    """read_signals then split_signals; a result or a MapperError, nothing else."""
    try:
        signals = read_signals(path, *COLUMNS)
    except MapperError:
        return None
    _check_signals(signals)
    try:
        pieces = split_signals(signals)
    except MapperError:
        return signals
    for piece in pieces:
        assert len(piece.t) >= 2 and np.isfinite(piece.y).all()
        # a window too short to stand alone is still kept, and says so
        assert len(piece.t) >= MIN_FILE_SAMPLES or "short_plateau" in piece.flags
    return signals


HEADER = b"t,u,y\n"


@SETTINGS
@given(body=st.binary(max_size=3000), header=st.booleans(), suffix=st.sampled_from([".csv", ".parquet"]))
def test_random_bytes_never_crash_the_reader(body, header, suffix):
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / f"random{suffix}"
        path.write_bytes((HEADER if header else b"") + body)
        _read(path)


_cell_text = st.text(alphabet=st.sampled_from(list("0123456789.,-+eE ;naifNI\"'x\t%")), max_size=8)
_number = st.one_of(st.floats(allow_nan=True, allow_infinity=True), st.integers(-10**15, 10**15))
_cell = st.one_of(_number, _cell_text, st.none())


@st.composite
def tables(draw):
    """A table with the three columns: mostly plausible step tests, with faults mixed in."""
    n = draw(st.integers(0, 80))
    step_at = draw(st.integers(0, max(n - 1, 0)))
    t = np.arange(n, dtype=float) * draw(st.sampled_from([1e-3, 0.5, 1.0, 60.0]))
    u = np.where(np.arange(n) >= step_at, draw(st.floats(-1e6, 1e6)), draw(st.floats(-1e6, 1e6)))
    y = np.cumsum(draw(st.lists(st.floats(-10, 10), min_size=n, max_size=n))) if n else np.array([])
    columns = {"t": list(t), "u": list(u), "y": list(y)}
    for _ in range(draw(st.integers(0, 4))):  # faults: odd cells at random places
        if n == 0:
            break
        name = draw(st.sampled_from(COLUMNS))
        columns[name][draw(st.integers(0, n - 1))] = draw(_cell)
    if draw(st.booleans()):  # sometimes the time goes wrong
        order = draw(st.permutations(range(n)))
        columns["t"] = [columns["t"][i] for i in order]
    return pd.DataFrame(columns)


@SETTINGS
@given(frame=tables(), kind=st.sampled_from(["csv", "semicolon", "parquet"]))
def test_random_tables_give_signals_or_a_mapper_error(frame, kind):
    with tempfile.TemporaryDirectory() as folder:
        if kind == "parquet":
            path = Path(folder) / "table.parquet"
            for name in frame.columns:  # a Parquet column has one type: mixed ones become text
                if frame[name].map(type).nunique() > 1:
                    frame[name] = frame[name].map(lambda v: None if v is None else str(v))
            frame.to_parquet(path, index=False)
        else:
            path = Path(folder) / "table.csv"
            frame.to_csv(path, index=False, sep=";" if kind == "semicolon" else ",",
                         decimal="," if kind == "semicolon" else ".")
        signals = _read(path)
    if signals is not None and kind != "semicolon":
        # what was read must be what was written (for rows the reader accepted whole)
        written = pd.to_numeric(frame["u"], errors="coerce").to_numpy(dtype=float)
        if len(written) == len(signals.u):
            np.testing.assert_allclose(signals.u, written, rtol=1e-12)


# -- the fitter ---------------------------------------------------------------------------
def _identify():
    from mapper.identification.identify import identify
    return identify


# finite values up to the magnitude the reader admits (ingest.MAX_MAGNITUDE), plus NaN and inf
_values = st.one_of(st.floats(-1e12, 1e12), st.sampled_from([math.nan, math.inf, -math.inf]))


@st.composite
def fitter_inputs(draw):
    n = draw(st.integers(0, 150))
    period = draw(st.sampled_from([1e-4, 0.1, 1.0, 500.0]))
    t = np.arange(n) * period
    shape = draw(st.sampled_from(["step", "random", "flat", "ramp"]))
    if shape == "step":
        at = draw(st.integers(0, max(n - 1, 0)))
        u = np.where(np.arange(n) >= at, draw(st.floats(-100, 100)), draw(st.floats(-100, 100)))
        y = np.array(draw(st.lists(st.floats(-1e3, 1e3), min_size=n, max_size=n)))
    elif shape == "random":
        u = np.array(draw(st.lists(_values, min_size=n, max_size=n)))
        y = np.array(draw(st.lists(_values, min_size=n, max_size=n)))
    elif shape == "flat":
        u = np.full(n, draw(st.floats(-1e3, 1e3)))
        y = np.full(n, draw(st.floats(-1e3, 1e3)))
    else:
        u = np.where(np.arange(n) >= n // 3, 1.0, 0.0)
        y = np.arange(n) * draw(st.floats(-1e3, 1e3))
    return t, u.astype(float), y.astype(float)


@SETTINGS
@given(data=fitter_inputs(), method=st.sampled_from(["least_squares", "graphical", "smith", "sundaresan", "area"]))
def test_random_arrays_give_a_fit_or_a_mapper_error(data, method):
    t, u, y = data
    try:
        result = _identify()(t, u, y, method=method)
    except MapperError:
        return
    assert result.quality in ("good", "suspect", "rejected")
    assert result.model in ("fopdt", "integrating", "none")
    for name in ("gain", "time_constant", "dead_time"):
        value = getattr(result, name)
        assert value is None or not math.isinf(value), (name, value)
    if result.quality != "rejected":
        assert result.gain is not None and math.isfinite(result.gain)
    row = result.to_row()
    assert isinstance(row, dict) and row["quality"] == result.quality
