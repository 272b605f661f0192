"""The small API for ETL jobs: run what is due, or check a DataFrame in hand.

``run_monitor`` (one slot) is re-exported from :mod:`monitor.runs.run`.  A job
that has its own scheduler (cron, Airflow, a loader's post-load hook) calls
:func:`run_due` as often as it likes: the run ledger makes every call after the
first one for a slot a no-op.  A job that already holds the rows calls
:func:`check_frame` and gets the family's report without touching any store.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

from .errors import ConfigurationError

if TYPE_CHECKING:
    from ._checks_api import CheckReport
    from .family import Family
    from .stats.family import FamilyReport

__all__ = ["FrameCheck", "check_frame", "run_due"]


def run_due(config: str | Path | Any, *, now: dt.datetime | None = None,
            monitors: Iterable[str] | None = None, store: Any = None,
            owner: str | None = None) -> list[Any]:
    """Run every slot that is due now for the scheduled monitors of a spec.

    Which slots are due follows each monitor's ``[schedule]``: the cron slots
    since its latest completed run, under its ``when_missed`` policy and
    ``late_start_grace_minutes`` (see :mod:`monitor.runs.schedule`).  Monitors
    without a schedule are not run here (call :func:`monitor.run_monitor`).

    Parameters
    ----------
    config
        Path of the monitor spec (or a parsed spec).
    now
        The current instant (aware); default: the clock.
    monitors
        Names to consider (default: every scheduled monitor).
    store
        An open :class:`storage.history.HistoryStore` to use instead of the spec's.
    owner
        Name recorded with each attempt (default ``host:pid``).

    Returns
    -------
    list of RunOutcome
        One per slot tried, oldest first per monitor; empty when nothing was due.
        A slot another process holds comes back ``skipped``; a failed run is
        recorded in the history with its reason and comes back ``failed``.
    """
    from .runs._build import open_store
    from .runs.ledger import read_ledger
    from .runs.run import default_owner, run_monitor
    from .runs.schedule import due_slots
    from .runs.spec import Spec, load_spec

    spec = config if isinstance(config, Spec) else load_spec(config)
    if now is not None and (now.tzinfo is None or now.utcoffset() is None):
        raise ConfigurationError(f"now is a naive datetime ({now.isoformat()})",
                                 where="run_due(now=...)",
                                 hint="pass a timezone-aware datetime, e.g. with tzinfo=UTC")
    moment = (now or dt.datetime.now(dt.UTC)).astimezone(dt.UTC)
    names = list(monitors) if monitors is not None else [
        name for name, monitor in spec.monitors.items() if monitor.schedule is not None]
    history = store if store is not None else open_store(spec)
    outcomes: list[Any] = []
    try:
        for name in names:
            monitor = spec.monitor(name)
            ledger = read_ledger(history, name)
            for slot in due_slots(monitor, ledger.completed, moment):
                outcomes.append(run_monitor(spec, name, slot, store=history,
                                            owner=owner or default_owner(), now=now))
    finally:
        if store is None:
            history.close()
    return outcomes


@dataclass(frozen=True, slots=True)
class FrameCheck:
    """What :func:`check_frame` found on one DataFrame.

    ``family`` is every candidate refitted from one scan, ranked by the family's
    criterion, with the nested F-tests and the verdict on the chosen model;
    ``chosen`` the assumption checks of the chosen model on the same rows (and,
    with a baseline, the drift checks against it).  Everything is statistical
    evidence, not proof: people who know the data decide what to do with it.
    """

    family: FamilyReport
    chosen: CheckReport

    @property
    def findings(self) -> tuple[Any, ...]:
        """Checks of the chosen model whose verdict is ``warn`` or ``fail``."""
        return tuple(c for c in self.chosen.checks if c.verdict in ("warn", "fail"))

    @property
    def chosen_is_best(self) -> bool:
        return bool(self.family.verdict.chosen_is_best)

    def to_dict(self) -> dict[str, Any]:
        return {"family": self.family.to_dict(), "chosen": self.chosen.to_dict(),
                "findings": [c.check for c in self.findings]}


def _family_of(family_spec: Any) -> Family:
    from .family import Family
    from .runs.spec import FamilySettings, MonitorSpec
    from .stats.family import FamilySpec

    if isinstance(family_spec, Family):
        return family_spec
    if isinstance(family_spec, FamilySpec):
        return Family.from_spec(family_spec)
    if isinstance(family_spec, MonitorSpec):
        family_spec = family_spec.family
    if isinstance(family_spec, FamilySettings):
        return Family(response=family_spec.response, candidates=dict(family_spec.candidates),
                      chosen=family_spec.chosen, criterion=family_spec.criterion,
                      alpha=family_spec.alpha, margin=family_spec.margin)
    if isinstance(family_spec, Mapping):
        return Family.from_mapping(family_spec)
    if isinstance(family_spec, (str, Path)):
        return Family.from_toml(family_spec)
    raise ConfigurationError(
        f"family_spec must be a Family, a family mapping or a family file, got "
        f"{type(family_spec).__name__}", where="check_frame(family_spec=...)",
        hint="pass monitor.Family(response=..., candidates={...}, chosen=...)")


def check_frame(frame: Any, family_spec: Any, baseline: Any = None, *,
                time_column: str | None = None, strict: bool = False) -> FrameCheck:
    """Refit a family on a DataFrame in hand and check the chosen model; no store involved.

    Parameters
    ----------
    frame
        The fresh rows: a pandas DataFrame (or a pyarrow Table, or a CSV/Parquet path).
    family_spec
        A :class:`monitor.Family`, a family mapping (``response``, ``candidates``,
        ``chosen``, ...), the path of a family file, or a monitor's family settings.
    baseline
        Rows of a reference period (same kinds as ``frame``) or a stored baseline
        snapshot: adds the drift checks of the chosen model against it.
    time_column
        The column the rows are ordered by; the order-dependent checks
        (Durbin–Watson, Breusch–Godfrey, Ljung–Box, CUSUM) need it.
    strict
        Refuse rows with missing or non-finite values instead of leaving them out.

    Returns
    -------
    FrameCheck
        The family report and the chosen model's checks.

    Raises
    ------
    ConfigurationError
        An invalid family.
    DataValidationError, ModelFitError
        Missing columns, no usable rows, fewer rows than a candidate's coefficients.
    """
    from ._checks_api import check_data

    family = _family_of(family_spec)
    report = family.evaluate(frame, strict=strict)
    chosen = check_data(frame, family.candidates[family.chosen], time_column=time_column,
                        baseline=baseline, categorical=family.categorical, strict=strict)
    return FrameCheck(report, chosen)
