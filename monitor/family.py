"""The public face of candidate families: ``monitor.Family`` and the family file.

A family file (TOML) holds the keys below; the monitor spec reuses the same keys
for the family of a monitor, so :func:`parse_family_mapping` takes the key path
of the family (``where``) for its error messages::

    response  = "load"
    chosen    = "weather"
    criterion = "aic"        # or "bic", "aicc"; optional, default "aic"
    alpha     = 0.05         # optional: level of the F-tests
    margin    = 2.0          # optional: Δ within which the chosen model is good enough

    [candidates]
    base    = "load ~ temperature"
    weather = "load ~ temperature + wind + humidity"
    full    = "load ~ temperature * weekend + wind + humidity"
"""

from __future__ import annotations

import math
import tomllib
from collections.abc import Callable, Collection, Iterable, Mapping
from pathlib import Path
from typing import Any

from ._frames import DEFAULT_CHUNK_ROWS, TableInput, chunk_source
from .errors import ConfigurationError
from .stats.family import FamilyReport, FamilySpec, evaluate_family, make_family_spec
from .stats.formula import CategoricalSpec

__all__ = ["FAMILY_KEYS", "Family", "FamilyReport", "parse_family_mapping"]

#: The keys of a family (in a family file or a monitor spec), and whether each is required.
FAMILY_KEYS: dict[str, bool] = {
    "response": True,
    "candidates": True,
    "chosen": True,
    "criterion": False,
    "alpha": False,
    "margin": False,
}

_EXAMPLE = ('response = "load", chosen = "weather" and a [candidates] table of '
            'name = "formula" lines')


def parse_family_mapping(
    mapping: Mapping[str, Any], *, where: str = "family", ignore: Collection[str] = ()
) -> FamilySpec:
    """Check the family keys of a parsed configuration table and return a :class:`FamilySpec`.

    Parameters
    ----------
    mapping
        The table: ``response``, ``candidates`` (name -> formula), ``chosen`` and
        optionally ``criterion``, ``alpha``, ``margin``.
    where
        Key path of the table, used in errors (``"monitors.heat.family"``).
    ignore
        Keys that belong to the enclosing table and are not the family's.

    Raises
    ------
    ConfigurationError
        Naming the key path, the value found and the fix.
    """
    if not isinstance(mapping, Mapping):
        raise ConfigurationError(f"a family must be a table of keys, got {type(mapping).__name__}",
                                 where=where, hint=f"write {_EXAMPLE}")
    unknown = [key for key in mapping if key not in FAMILY_KEYS and key not in ignore]
    if unknown:
        raise ConfigurationError(
            f"unknown key {unknown[0]!r}" + (f" (and {len(unknown) - 1} more)"
                                             if len(unknown) > 1 else ""),
            where=f"{where}.{unknown[0]}",
            hint="a family has the keys " + ", ".join(FAMILY_KEYS) + "; check the spelling")
    for key, required in FAMILY_KEYS.items():
        if required and key not in mapping:
            raise ConfigurationError(f"the family has no {key!r}", where=f"{where}.{key}",
                                     hint=f"a family needs {_EXAMPLE}")
    for key in ("response", "chosen", "criterion"):
        if key in mapping and not isinstance(mapping[key], str):
            raise ConfigurationError(f"{key} must be text, got {mapping[key]!r}",
                                     where=f"{where}.{key}",
                                     hint=f'write it in quotes, e.g. {key} = "..."')
    for key in ("alpha", "margin"):
        value = mapping.get(key)
        if key in mapping and (not isinstance(value, (int, float)) or isinstance(value, bool)
                               or not math.isfinite(float(value))):
            raise ConfigurationError(f"{key} must be a number, got {value!r}",
                                     where=f"{where}.{key}",
                                     hint="write a plain number, e.g. alpha = 0.05, margin = 2")
    candidates = mapping["candidates"]
    if not isinstance(candidates, Mapping):
        raise ConfigurationError(
            f"candidates must be a table of name = \"formula\" lines, got "
            f"{type(candidates).__name__}", where=f"{where}.candidates",
            hint='write [candidates] and then lines such as base = "load ~ temperature"')
    return make_family_spec(
        response=mapping["response"], candidates=dict(candidates), chosen=mapping["chosen"],
        criterion=mapping.get("criterion", "aic"), alpha=mapping.get("alpha", 0.05),
        margin=mapping.get("margin", 2.0), where=where)


class Family:
    """A registered family of candidate linear models, with the one in production.

    The arguments are checked when the family is made (a family is configuration:
    it should fail before any data are read), and kept as given.

    Parameters
    ----------
    response
        The response column (or transform) every candidate models.
    candidates
        Name -> formula in Wilkinson–Rogers notation; at least two.
    chosen
        Name of the candidate in production.
    criterion
        ``"aic"`` (default), ``"bic"`` or ``"aicc"``: what ranks the candidates.
    alpha
        Level of the overall and partial F-tests (default 0.05).
    margin
        The chosen model still counts as good enough while its Δ ≤ margin (default 2).
    categorical
        Declared levels / reference level per categorical column.

    Examples
    --------
    >>> family = Family(response="load", chosen="weather", candidates={
    ...     "base": "load ~ temperature", "weather": "load ~ temperature + wind"})
    >>> report = family.evaluate("readings.parquet")        # doctest: +SKIP
    >>> report.verdict.summary                              # doctest: +SKIP
    """

    def __init__(
        self,
        *,
        response: str,
        candidates: Mapping[str, str],
        chosen: str,
        criterion: str = "aic",
        alpha: float = 0.05,
        margin: float = 2.0,
        categorical: Mapping[str, CategoricalSpec] | None = None,
    ) -> None:
        self.response = response
        self.candidates = candidates
        self.chosen = chosen
        self.criterion = criterion
        self.alpha = alpha
        self.margin = margin
        self.categorical = categorical
        self.spec = make_family_spec(response=response, candidates=candidates, chosen=chosen,
                                     criterion=criterion, alpha=alpha, margin=margin,
                                     categorical=categorical)

    @classmethod
    def from_spec(cls, spec: FamilySpec) -> Family:
        return cls(response=spec.response, candidates=dict(spec.candidates), chosen=spec.chosen,
                   criterion=spec.criterion, alpha=spec.alpha, margin=spec.margin,
                   categorical=spec.categorical_mapping() or None)

    @classmethod
    def from_mapping(cls, mapping: Mapping[str, Any], *, where: str = "family") -> Family:
        """A family from a parsed configuration table (see :func:`parse_family_mapping`)."""
        return cls.from_spec(parse_family_mapping(mapping, where=where))

    @classmethod
    def from_toml(cls, path: str | Path) -> Family:
        """A family from a family file (TOML); errors name the file and the key."""
        location = str(path)
        try:
            with open(path, "rb") as handle:
                mapping = tomllib.load(handle)
        except FileNotFoundError as error:
            raise ConfigurationError(f"no family file at {location!r}", where=location,
                                     hint="check the path given to --family") from error
        except OSError as error:
            raise ConfigurationError(f"cannot read the family file: {error.strerror}",
                                     where=location, hint="check the path and its "
                                     "permissions") from error
        except tomllib.TOMLDecodeError as error:
            raise ConfigurationError(f"the family file is not valid TOML: {error}",
                                     where=location,
                                     hint="check quotes around formulas and that no candidate "
                                     "name appears twice") from error
        return cls.from_mapping(mapping, where=location)

    def __repr__(self) -> str:
        return (f"Family(response={self.response!r}, candidates={dict(self.candidates)!r}, "
                f"chosen={self.chosen!r}, criterion={self.criterion!r}, alpha={self.alpha!r}, "
                f"margin={self.margin!r})")

    def evaluate(
        self,
        data: TableInput | Callable[[], Iterable[Mapping[str, Any]]],
        *,
        strict: bool = False,
        refinement_passes: int = 1,
        chunk_rows: int = DEFAULT_CHUNK_ROWS,
    ) -> FamilyReport:
        """Refit every candidate from one scan of ``data`` and compare them.

        Parameters
        ----------
        data
            A pandas DataFrame, a pyarrow Table, the path of a CSV or Parquet file,
            or a chunk source (a callable returning a fresh iterator of mappings
            column -> 1-D numpy array) for data that should stream.
        strict
            Refuse rows with missing, non-finite or unseen values instead of
            leaving them out (for every candidate) and counting them.
        refinement_passes
            Extra reads that refine all candidates' coefficients together.

        Returns
        -------
        FamilyReport
            Fits, ranking, nested tests and the verdict (see
            :mod:`monitor.stats.family`).  The verdict is statistical evidence, not
            proof: people who know the domain decide what to do with it.
        """
        if callable(data):
            source = data
        else:
            from ._api import require_columns

            columns = list(self.spec.columns())
            require_columns(data, columns, "family candidates")
            source = chunk_source(data, columns, chunk_rows)
        return evaluate_family(self.spec, source, refinement_passes=refinement_passes,
                               strict=strict)
