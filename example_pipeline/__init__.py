"""The regwarden demo: an INVENTED district-heating operator and its nightly pipeline.

Everything here is made up for the demonstration (see ``example_pipeline/README.md``).
:mod:`example_pipeline.scenario` holds the substations and the planted events;
:mod:`example_pipeline.generate` writes the readings to Parquet and SQLite and
appends days to them, as a user's own ETL job would.

Names are imported lazily, so ``python -m example_pipeline.generate`` runs the
module once, as a script, without a second copy being imported first.  The
function ``generate`` is not re-exported here, because the package attribute
``generate`` is the module of that name: import it as
``from example_pipeline.generate import generate``.
"""

from __future__ import annotations

import importlib
from typing import Any

# public name -> module that defines it
_EXPORTS = {
    "Appended": "example_pipeline.generate",
    "GeneratedData": "example_pipeline.generate",
    "append_day": "example_pipeline.generate",
    "append_days": "example_pipeline.generate",
    "read_manifest": "example_pipeline.generate",
    "simulate": "example_pipeline.generate",
    "EVENTS": "example_pipeline.scenario",
    "SUBSTATIONS": "example_pipeline.scenario",
    "SUBSTATION_NAMES": "example_pipeline.scenario",
    "PlantedEvent": "example_pipeline.scenario",
}

__all__ = sorted(_EXPORTS)


def __getattr__(name: str) -> Any:
    module = _EXPORTS.get(name)
    if module is None:
        raise AttributeError(f"module 'example_pipeline' has no attribute {name!r}")
    value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted([*globals(), *__all__])
