"""mapper: from a campaign of open-loop step tests to FOPDT models, an operating map and a
single-controller-or-gain-schedule verdict.

Public names are re-exported here and loaded on first use, so the command line starts fast.
"""

from __future__ import annotations

import importlib

__version__ = "0.1.0"

_EXPORTS = {
    # errors
    "MapperError": "errors", "DataError": "errors", "CampaignFileError": "errors",
    "StoreError": "errors", "NotAStoreError": "errors", "StoreInUseError": "errors",
    "NotFoundError": "errors", "IdentificationError": "errors", "OutOfRangeError": "errors",
    # campaign, import and store
    "Campaign": "campaign", "TestEntry": "campaign", "load_campaign": "campaign",
    "import_sources": "ingest", "read_signals": "ingest", "split_signals": "segment",
    "find_moves": "segment", "uniform_grid": "segment", "ImportSummary": "ingest",
    "Store": "store",
    # response maths and identification
    "zoh_coefficients": "models", "simulate_fopdt": "models", "simulate_integrating": "models",
    "fopdt_sensitivities": "models", "step_response": "models",
    "identify": "identify", "FitResult": "identify", "METHODS": "identify",
    "find_step": "quality", "StepInfo": "quality", "cramer_rao_sd": "uncertainty",
    "fit_store": "fitting",
    # map, tuning, verdict
    "build_map": "opmap", "OperatingMap": "opmap",
    "compare_repeats": "compare", "compare_directions": "compare", "compare_campaigns": "compare",
    "simc_pi": "tuning", "lambda_pi": "tuning", "PITuning": "tuning", "loop_margins": "tuning",
    "decide": "verdict", "Verdict": "verdict",
    # charts and report
    "operating_map_chart": "charts", "overlay_chart": "charts", "step_test_chart": "charts",
    "margins_chart": "charts", "schedule_chart": "charts",
    "write_report": "report", "ReportInfo": "report",
    # jobs behind the commands
    "operating_map": "jobs", "parameters_at": "jobs", "verdict_for": "jobs",
    "compare_two": "jobs", "write_campaign_report": "jobs", "run_demo": "jobs",
    "simulate_exchanger": "demo", "linearised_parameters": "demo", "write_sample_campaign": "demo",
}

__all__ = sorted(_EXPORTS) + ["__version__"]


def __getattr__(name: str):
    if name in _EXPORTS:
        module = importlib.import_module(f".{_EXPORTS[name]}", __name__)
        return getattr(module, name)
    raise AttributeError(f"module 'mapper' has no attribute {name!r}")


def __dir__():
    return __all__
