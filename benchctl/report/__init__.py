"""Reports, revision comparison and datasheet tables, made from run folders alone.

Names are imported lazily, so that the command line does not load matplotlib until a
report is actually made.
"""

from __future__ import annotations

import importlib
from typing import Any

_EXPORTS = {
    "build_report": "benchctl.report.build",
    "Comparison": "benchctl.report.compare",
    "CurveDelta": "benchctl.report.compare",
    "ParameterDelta": "benchctl.report.compare",
    "compare_runs": "benchctl.report.compare",
    "Datasheet": "benchctl.report.datasheets",
    "DatasheetGroup": "benchctl.report.datasheets",
    "DatasheetRow": "benchctl.report.datasheets",
    "datasheet": "benchctl.report.datasheets",
    "howe_factor": "benchctl.report.datasheets",
}

__all__ = sorted(_EXPORTS)


def __getattr__(name: str) -> Any:
    module = _EXPORTS.get(name)
    if module is None:
        raise AttributeError(f"module 'benchctl.report' has no attribute {name!r}")
    return getattr(importlib.import_module(module), name)


def __dir__() -> list[str]:
    return __all__
