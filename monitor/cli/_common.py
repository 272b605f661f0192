"""Helpers shared by the commands that take a monitor spec (CONFIG)."""

from __future__ import annotations

import datetime as dt
from typing import Any

from ..errors import ConfigurationError


def parse_instant(text: str, option: str) -> dt.datetime:
    """An ISO date or date-time; naive values are UTC; a date means its midnight UTC."""
    try:
        moment = dt.datetime.fromisoformat(text)
    except ValueError:
        raise ConfigurationError(f"{option} must be an ISO date or date-time, got {text!r}",
                                 where=option, hint="for example 2025-03-01 or "
                                 "2025-03-01T06:00+01:00") from None
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=dt.UTC)
    return moment.astimezone(dt.UTC)


def open_spec_and_store(config: str) -> tuple[Any, Any]:
    from ..runs._build import open_store
    from ..runs.spec import load_spec

    spec = load_spec(config)
    return spec, open_store(spec)
