"""What an installed mapper carries besides its modules: the sample campaign and the report assets.

The wheel itself is built and installed by the smoke step of ``.ci/run``; these checks are
the quick part: the packaged sample campaign is the readable top-level copy, byte for byte,
and every data file inside the package is named by ``[tool.setuptools.package-data]``, so
the wheel carries it.
"""

from __future__ import annotations

import tomllib
from pathlib import Path

from mapper.app.jobs import sample_campaign_folder
from mapper.demo.sample import sample_campaign_folder as packaged_folder

ROOT = Path(__file__).resolve().parents[1]
PACKAGE = ROOT / "mapper"


def _files(folder: Path) -> dict[str, bytes]:
    return {p.relative_to(folder).as_posix(): p.read_bytes()
            for p in sorted(folder.rglob("*")) if p.is_file()}


def test_packaged_sample_campaign_is_the_readable_copy():
    packaged = _files(packaged_folder())
    readable = _files(ROOT / "sample_campaign")
    assert sorted(packaged) == sorted(readable)
    changed = [name for name in readable if packaged[name] != readable[name]]
    assert changed == [], "copy sample_campaign/ into mapper/demo/sample_campaign/ again"
    # both campaigns with their files, and the truth table
    assert {"exchanger_2026/campaign.toml", "exchanger_2024/campaign.toml",
            "true_parameters.csv"} <= set(packaged)
    assert sum(name.endswith(".csv") for name in packaged) > 20


def test_demo_reads_the_packaged_copy():
    assert sample_campaign_folder() == packaged_folder()
    assert packaged_folder().is_relative_to(PACKAGE)


def _package_data_patterns() -> dict[str, list[str]]:
    with open(ROOT / "pyproject.toml", "rb") as handle:
        return tomllib.load(handle)["tool"]["setuptools"]["package-data"]


def test_every_data_file_in_the_package_is_declared_package_data():
    declared: set[Path] = set()
    for package, patterns in _package_data_patterns().items():
        home = ROOT.joinpath(*package.split("."))
        assert (home / "__init__.py").is_file(), package
        for pattern in patterns:
            matched = set(home.glob(pattern))
            assert matched, f"{package}: {pattern} matches nothing"
            declared |= matched
    data = {p for p in PACKAGE.rglob("*") if p.is_file() and p.suffix not in (".py", ".pyc")
            and "__pycache__" not in p.parts}
    assert sorted(map(str, data - declared)) == []
    # the report's styles and scripts are among them
    assert {"report.css", "render.js", "error_hook.js"} <= {p.name for p in declared}
