"""``regwarden promote``: make another candidate the chosen model, recorded with who/when/why."""

from __future__ import annotations

import argparse
from typing import Any

from ..errors import EXIT_OK, ConfigurationError
from ._common import open_spec_and_store
from ._output import add_format_option, emit_json, emit_text


def register(subparsers: Any) -> None:
    parser = subparsers.add_parser(
        "promote", help="make a candidate the chosen model (recorded; resets the baseline)",
        description="Record that a candidate becomes the chosen model of a monitor: who (the OS "
        "user), when and why. The next run takes its fresh window as the new baseline.")
    parser.add_argument("config", help="the monitor spec (TOML)")
    parser.add_argument("--monitor", required=True)
    parser.add_argument("--model", required=True, help="the candidate's name in the family")
    parser.add_argument("--reason", required=True, help="why (kept in the history)")
    parser.add_argument("--segment", default="", help="only for this segment value")
    add_format_option(parser)
    parser.set_defaults(handler=run)


def run(options: argparse.Namespace) -> int:
    from ..runs.run import run_as_user

    spec, store = open_spec_and_store(options.config)
    monitor = spec.monitor(options.monitor)
    if options.model not in monitor.family.candidates:
        raise ConfigurationError(
            f"{options.model!r} is not a candidate of monitor {monitor.name!r}", where="--model",
            hint=f"the candidates are: {', '.join(monitor.family.candidates)}")
    if not options.reason.strip():
        raise ConfigurationError("the reason is empty", where="--reason",
                                 hint="say why, for the people reading the history later")
    previous = store.chosen_model(monitor.name, options.segment) or monitor.family.chosen
    user = run_as_user()
    promotion_id = store.record_promotion(monitor.name, options.model, by=user,
                                          reason=options.reason, segment=options.segment,
                                          previous_model=previous)
    store.close()
    result = {"promotion_id": promotion_id, "monitor": monitor.name, "model": options.model,
              "previous_model": previous, "by": user, "segment": options.segment}
    if options.format == "json":
        emit_json(result)
    else:
        emit_text(f"{monitor.name}: chosen model is now {options.model!r} (was {previous!r}), "
                  f"recorded for {user}; the next run sets a new baseline")
    return EXIT_OK
