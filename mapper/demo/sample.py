"""Where the sample campaign lives once mapper is installed.

The sample campaign ships inside the package (``mapper/demo/sample_campaign/``, package
data), so ``mapper demo`` works from a wheel as well as from a source checkout. The
top-level ``sample_campaign/`` folder of the source tree is the readable copy; a test
checks that the two are identical, and ``python -m mapper.demo --write FOLDER``
regenerates either from the simulator.
"""

from __future__ import annotations

from importlib import resources
from pathlib import Path

#: Folder of the packaged copy, relative to the ``mapper.demo`` package.
SAMPLE_FOLDER_NAME = "sample_campaign"


def sample_campaign_folder() -> Path:
    """The sample campaign shipped with the package (a real folder on disk).

    Returns
    -------
    pathlib.Path
        ``.../mapper/demo/sample_campaign`` holding ``exchanger_2026/``,
        ``exchanger_2024/`` (each a ``campaign.toml`` and its CSV files) and
        ``true_parameters.csv``.
    """
    return Path(str(resources.files("mapper.demo").joinpath(SAMPLE_FOLDER_NAME)))
