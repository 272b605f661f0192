"""regwarden: keep families of linear regression models honest, night after night.

The public API is short; everything not listed in ``__all__`` may change.
Names are imported lazily so that ``import monitor.errors`` (used by the storage
layer) stays cheap and free of cycles.
"""

from __future__ import annotations

import importlib
from typing import Any

__version__ = "0.1.0"

# public name -> module that defines it
_EXPORTS = {
    "fit": "monitor._api",
    "check_data": "monitor._checks_api",
    "build_baseline": "monitor._checks_api",
    "CheckReport": "monitor._checks_api",
    "CheckResult": "monitor.stats.checks",
    "BaselineSnapshot": "monitor.stats.drift",
    "run_monitor": "monitor.runs.run",
    "RunOutcome": "monitor.runs.run",
    "run_due": "monitor._etl",
    "check_frame": "monitor._etl",
    "FitResult": "monitor.stats.results",
    "Coefficient": "monitor.stats.results",
    "CategoricalSpec": "monitor.stats.formula",
    "parse_formula": "monitor.stats.formula",
    "Family": "monitor.family",
    "FamilyReport": "monitor.stats.family",
    "RegwardenError": "monitor.errors",
    "ConfigurationError": "monitor.errors",
    "FormulaError": "monitor.errors",
    "DataValidationError": "monitor.errors",
    "ModelFitError": "monitor.errors",
    "SourceError": "monitor.errors",
    "StorageError": "monitor.errors",
}

__all__ = sorted(_EXPORTS)


def __getattr__(name: str) -> Any:
    module = _EXPORTS.get(name)
    if module is None:
        raise AttributeError(f"module 'monitor' has no attribute {name!r}")
    value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted([*globals(), *__all__])
