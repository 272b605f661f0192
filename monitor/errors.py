"""The error tree shared by every layer of regwarden.

This module imports nothing from the project, so the storage layer can raise
these errors without pulling in any statistics.

::

    RegwardenError                         catch this in shells; has .exit_code
    ├── ConfigurationError(ValueError)     bad usage, config, family or formula   -> exit 2
    │   └── FormulaError                   a formula that does not parse or names an unknown function
    ├── DataValidationError(ValueError)    the rows cannot be used as they are     -> exit 3
    │   └── ModelFitError                  e.g. fewer usable rows than coefficients
    ├── SourceError                        a source cannot be read (file, table)   -> exit 3
    └── StorageError                       the history store failed                -> exit 3

An unexpected exception (anything else) is a bug: the command line shows it as
one line and exits 4.

Every error is built from structured parts: ``what`` went wrong, ``where``
(file, column, config key, row) and ``hint`` (what to do).  They are kept as
attributes, so alerting can use ``error.where`` without parsing text.
"""

from __future__ import annotations

from typing import Any

__all__ = [
    "ConfigurationError",
    "DataValidationError",
    "FormulaError",
    "ModelFitError",
    "RegwardenError",
    "SourceError",
    "StorageError",
    "EXIT_OK",
    "EXIT_ALERTS",
    "EXIT_USAGE",
    "EXIT_DATA",
    "EXIT_INTERNAL",
]

#: Exit codes of the command line (the same for every command).
EXIT_OK = 0
EXIT_ALERTS = 1
EXIT_USAGE = 2
EXIT_DATA = 3
EXIT_INTERNAL = 4


class RegwardenError(Exception):
    """Base of every error regwarden raises on purpose."""

    exit_code: int = EXIT_INTERNAL
    #: short machine-readable kind, stored with failed runs
    kind: str = "error"

    def __init__(
        self,
        what: str,
        *,
        where: str | None = None,
        hint: str | None = None,
        **context: Any,
    ) -> None:
        self.what = what
        self.where = where
        self.hint = hint
        self.context = context
        super().__init__(self._compose())

    def _compose(self) -> str:
        text = self.what
        if self.where:
            text += f" [{self.where}]"
        if self.hint:
            text += f"; {self.hint}"
        return text

    def to_dict(self) -> dict[str, Any]:
        """Plain-data form, for the history store and JSON output."""
        return {
            "error": type(self).__name__,
            "kind": self.kind,
            "message": str(self),
            "what": self.what,
            "where": self.where,
            "hint": self.hint,
        }


class ConfigurationError(RegwardenError, ValueError):
    """Bad command-line usage, monitor spec, family file or formula."""

    exit_code = EXIT_USAGE
    kind = "config"


class FormulaError(ConfigurationError):
    """A formula that cannot be parsed or evaluated.

    ``position`` is the 0-based character offset of the problem, when known.
    """

    kind = "formula"

    def __init__(self, what: str, *, formula: str, position: int | None = None,
                 hint: str | None = None) -> None:
        self.formula = formula
        self.position = position
        where = f"formula {formula!r}"
        if position is not None:
            where += f" at position {position}"
            what = f"{what}\n    {formula}\n    {' ' * position}^"
        super().__init__(what, where=where, hint=hint)


class DataValidationError(RegwardenError, ValueError):
    """The rows cannot be used as they are (missing column, wrong type, ...)."""

    exit_code = EXIT_DATA
    kind = "data"


class ModelFitError(DataValidationError):
    """A model cannot be fitted on the rows given (e.g. fewer rows than coefficients)."""

    kind = "fit"


class SourceError(RegwardenError):
    """A source (file, folder, table, query) cannot be read."""

    exit_code = EXIT_DATA
    kind = "source"


class StorageError(RegwardenError):
    """The history store failed (unreachable, schema too new, write refused)."""

    exit_code = EXIT_DATA
    kind = "storage"
