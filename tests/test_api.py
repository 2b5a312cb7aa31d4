"""The public names re-exported from `mapper` resolve, and the Python API runs a small job."""

from __future__ import annotations

import mapper
from conftest import write_campaign


def test_every_public_name_resolves():
    for name in mapper.__all__:
        assert getattr(mapper, name) is not None, name


def test_python_api_import_fit_and_query(tmp_path):
    folder = write_campaign(tmp_path / "c", [dict(level=30.0, gain=2.0), dict(level=30.0, gain=2.0, seed=5),
                                             dict(level=60.0, gain=2.0), dict(level=60.0, gain=2.0, seed=7)])
    with mapper.Store(tmp_path / "s.duckdb") as store:
        summary = mapper.import_sources(store, [folder])
        assert summary.ok and summary.tests_imported == 4
        fitted = mapper.fit_store(store, workers=1)
        assert fitted.fitted == 4
        params = store.params()
    # every test was made with gain 2, time constant 10 s, dead time 3 s (tests/conftest.py)
    assert params["gain"].between(1.94, 2.06).all()
    assert params["time_constant"].between(9.4, 10.6).all()
    assert params["dead_time"].between(2.0, 4.0).all()
    opmap = mapper.build_map(params)
    answer = opmap.at(45.0)
    assert answer["gain_lo"] <= 2.0 <= answer["gain_hi"]
