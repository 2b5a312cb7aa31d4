"""PNG export in worker processes, and the JavaScript bundle kept in the user's cache folder."""

from __future__ import annotations

import pytest

from mapper.presentation import png_export
from mapper.presentation.report import vega

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification, section 5.2


def bar_spec(height: float) -> dict:
    return {"$schema": "https://vega.github.io/schema/vega-lite/v6.json",
            "data": {"values": [{"x": "a", "y": height}, {"x": "b", "y": 1.0}]},
            "mark": "bar", "encoding": {"x": {"field": "x", "type": "nominal"},
                                        "y": {"field": "y", "type": "quantitative"}},
            "width": 60, "height": 40}


def test_workers_write_the_same_pngs_in_the_order_given(tmp_path):
    names = ["third chart", "first", "second/odd name"]
    specs = [bar_spec(h) for h in (3.0, 1.0, 2.0)]
    serial = vega.write_pngs(zip(names, specs), tmp_path / "serial", workers=1)
    parallel = vega.write_pngs(zip(names, specs), tmp_path / "parallel", workers=2)
    assert [p.name for p in parallel] == ["third_chart.png", "first.png", "second_odd_name.png"]
    assert [p.name for p in serial] == [p.name for p in parallel]
    for one, other in zip(serial, parallel):
        assert one.read_bytes()[:8] == PNG_SIGNATURE
        assert one.read_bytes() == other.read_bytes()  # same renderer, same bytes
    # charts of different data differ
    assert parallel[0].read_bytes() != parallel[1].read_bytes()


def test_a_failing_chart_is_reported_and_the_workers_stop(tmp_path):
    export = png_export.PngExport(tmp_path, vega.vl_version(), workers=2)
    export.add("good", bar_spec(1.0))
    export.add("bad", {"mark": "no-such-mark", "data": {"values": []}})
    with pytest.raises(ValueError, match="conversion failed"):
        export.finish()
    assert export._pool is None


@pytest.fixture
def fake_bundle(monkeypatch, tmp_path):
    """The cache in a temporary folder and a stand-in for vl-convert's bundle, counting calls."""
    calls = []

    def build(vl_version=None):
        calls.append(vl_version)
        return "window.vegaEmbed=function(){};var s='</script>';"

    monkeypatch.setenv(vega.CACHE_ENV, str(tmp_path / "cache"))
    monkeypatch.setattr(vega.vl_convert, "javascript_bundle", build)
    vega.javascript_bundle.cache_clear()
    yield calls
    vega.javascript_bundle.cache_clear()  # later tests get the real bundle


def test_bundle_is_built_once_then_read_from_the_cache(fake_bundle, tmp_path):
    first = vega.javascript_bundle()
    assert "</script" not in first and "<\\/script" in first
    path = vega.bundle_cache_file()
    assert path is not None and path.parent == tmp_path / "cache"
    assert path.read_text(encoding="utf-8") == first
    assert "vl" + (vega.vl_version() or "default") in path.name
    vega.javascript_bundle.cache_clear()  # as a new process would start
    assert vega.javascript_bundle() == first
    assert len(fake_bundle) == 1


def test_damaged_cache_file_is_rebuilt(fake_bundle):
    path = vega.bundle_cache_file()
    path.parent.mkdir(parents=True)
    path.write_text("window.vegaEm", encoding="utf-8")  # cut short
    text = vega.javascript_bundle()
    assert "vegaEmbed" in text and len(fake_bundle) == 1
    assert path.read_text(encoding="utf-8") == text


def test_cache_that_cannot_be_written_is_skipped(fake_bundle, monkeypatch, tmp_path):
    blocker = tmp_path / "not_a_folder"
    blocker.write_text("a file where the cache folder would go")
    monkeypatch.setenv(vega.CACHE_ENV, str(blocker / "cache"))
    assert "vegaEmbed" in vega.javascript_bundle()
    assert blocker.read_text() == "a file where the cache folder would go"


def test_empty_cache_setting_turns_the_cache_off(fake_bundle, monkeypatch, tmp_path):
    monkeypatch.setenv(vega.CACHE_ENV, "")
    assert vega.cache_folder() is None
    vega.javascript_bundle()
    vega.javascript_bundle.cache_clear()
    vega.javascript_bundle()
    assert len(fake_bundle) == 2
    assert not (tmp_path / "cache").exists()


def test_default_cache_folder_follows_xdg(monkeypatch, tmp_path):
    monkeypatch.delenv(vega.CACHE_ENV, raising=False)
    monkeypatch.setattr(vega.sys, "platform", "linux")
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "xdg"))
    assert vega.cache_folder() == tmp_path / "xdg" / "mapper"
