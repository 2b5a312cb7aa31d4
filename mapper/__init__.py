"""mapper: from a campaign of open-loop step tests to FOPDT models, an operating map and a
single-controller-or-gain-schedule verdict.

The public API is listed below. Type checkers and editors read the explicit imports in the
``TYPE_CHECKING`` block; at run time each name is loaded on first use, so the command line
starts without numpy-heavy modules it does not need. The scenario simulator and the bench
live in :mod:`mapper.demo` and are not part of this API.
"""

from __future__ import annotations

import importlib
import os
from typing import TYPE_CHECKING, Any

# Every matrix mapper forms is small (a few columns by a record's samples). A threaded BLAS
# gains nothing on such sizes and, on a busy machine, its threads spin against each other
# and the fit worker processes (measured: 2.0 against 6.9 ms per test on 2 loaded cores).
# One thread unless the user chose otherwise; it takes effect only when mapper is imported
# before numpy, as the command line does.
for _variable in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_variable, "1")

__version__ = "0.2.0"

if TYPE_CHECKING:
    from mapper.analysis.compare import compare_campaigns, compare_directions, compare_repeats
    from mapper.analysis.margins import loop_margins
    from mapper.analysis.opmap import OperatingMap, build_map
    from mapper.analysis.tuning import PITuning, lambda_pi, simc_pi
    from mapper.analysis.verdict import Verdict, decide
    from mapper.app.jobs import compare_two, operating_map, parameters_at, run_demo, verdict_for, write_campaign_report
    from mapper.errors import (
        CampaignFileError,
        DataError,
        IdentificationError,
        MapperError,
        NotAStoreError,
        NotFoundError,
        OutOfRangeError,
        StoreError,
        StoreInUseError,
    )
    from mapper.identification.fitting import fit_store
    from mapper.identification.identify import FitResult, identify
    from mapper.identification.models import (
        fopdt_sensitivities,
        simulate_fopdt,
        simulate_integrating,
        step_response,
        zoh_coefficients,
    )
    from mapper.identification.quality import StepInfo, find_step
    from mapper.identification.uncertainty import cramer_rao_sd
    from mapper.presentation.charts import (
        margins_chart,
        operating_map_chart,
        overlay_chart,
        schedule_chart,
        step_test_chart,
    )
    from mapper.presentation.report import ReportInfo, write_report
    from mapper.signals import find_moves
    from mapper.store.campaign import Campaign, TestEntry, load_campaign
    from mapper.store.database import Store
    from mapper.store.ingest import ImportSummary, import_sources, read_signals
    from mapper.store.segment import split_signals, uniform_grid

_HOMES: dict[str, str] = {
    "MapperError": "mapper.errors",
    "DataError": "mapper.errors",
    "CampaignFileError": "mapper.errors",
    "StoreError": "mapper.errors",
    "NotAStoreError": "mapper.errors",
    "StoreInUseError": "mapper.errors",
    "NotFoundError": "mapper.errors",
    "IdentificationError": "mapper.errors",
    "OutOfRangeError": "mapper.errors",
    "Campaign": "mapper.store.campaign",
    "TestEntry": "mapper.store.campaign",
    "load_campaign": "mapper.store.campaign",
    "import_sources": "mapper.store.ingest",
    "read_signals": "mapper.store.ingest",
    "ImportSummary": "mapper.store.ingest",
    "split_signals": "mapper.store.segment",
    "find_moves": "mapper.signals",
    "uniform_grid": "mapper.store.segment",
    "Store": "mapper.store.database",
    "zoh_coefficients": "mapper.identification.models",
    "simulate_fopdt": "mapper.identification.models",
    "simulate_integrating": "mapper.identification.models",
    "fopdt_sensitivities": "mapper.identification.models",
    "step_response": "mapper.identification.models",
    "identify": "mapper.identification.identify",
    "FitResult": "mapper.identification.identify",
    "find_step": "mapper.identification.quality",
    "StepInfo": "mapper.identification.quality",
    "cramer_rao_sd": "mapper.identification.uncertainty",
    "fit_store": "mapper.identification.fitting",
    "build_map": "mapper.analysis.opmap",
    "OperatingMap": "mapper.analysis.opmap",
    "compare_repeats": "mapper.analysis.compare",
    "compare_directions": "mapper.analysis.compare",
    "compare_campaigns": "mapper.analysis.compare",
    "simc_pi": "mapper.analysis.tuning",
    "lambda_pi": "mapper.analysis.tuning",
    "PITuning": "mapper.analysis.tuning",
    "loop_margins": "mapper.analysis.margins",
    "decide": "mapper.analysis.verdict",
    "Verdict": "mapper.analysis.verdict",
    "operating_map_chart": "mapper.presentation.charts",
    "overlay_chart": "mapper.presentation.charts",
    "step_test_chart": "mapper.presentation.charts",
    "margins_chart": "mapper.presentation.charts",
    "schedule_chart": "mapper.presentation.charts",
    "write_report": "mapper.presentation.report",
    "ReportInfo": "mapper.presentation.report",
    "operating_map": "mapper.app.jobs",
    "parameters_at": "mapper.app.jobs",
    "verdict_for": "mapper.app.jobs",
    "compare_two": "mapper.app.jobs",
    "write_campaign_report": "mapper.app.jobs",
    "run_demo": "mapper.app.jobs",
}

__all__ = [
    "__version__",
    "Campaign",
    "CampaignFileError",
    "DataError",
    "FitResult",
    "IdentificationError",
    "ImportSummary",
    "MapperError",
    "NotAStoreError",
    "NotFoundError",
    "OperatingMap",
    "OutOfRangeError",
    "PITuning",
    "ReportInfo",
    "StepInfo",
    "Store",
    "StoreError",
    "StoreInUseError",
    "TestEntry",
    "Verdict",
    "build_map",
    "compare_campaigns",
    "compare_directions",
    "compare_repeats",
    "compare_two",
    "cramer_rao_sd",
    "decide",
    "find_moves",
    "find_step",
    "fit_store",
    "fopdt_sensitivities",
    "identify",
    "import_sources",
    "lambda_pi",
    "load_campaign",
    "loop_margins",
    "margins_chart",
    "operating_map",
    "operating_map_chart",
    "overlay_chart",
    "parameters_at",
    "read_signals",
    "run_demo",
    "schedule_chart",
    "simc_pi",
    "simulate_fopdt",
    "simulate_integrating",
    "split_signals",
    "step_response",
    "step_test_chart",
    "uniform_grid",
    "verdict_for",
    "write_campaign_report",
    "write_report",
    "zoh_coefficients",
]


def __getattr__(name: str) -> Any:
    home = _HOMES.get(name)
    if home is None:
        raise AttributeError(f"module 'mapper' has no attribute {name!r}")
    value = getattr(importlib.import_module(home), name)
    globals()[name] = value  # later lookups skip this function
    return value


def __dir__() -> list[str]:
    return list(__all__)
