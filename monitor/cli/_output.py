"""The one place the command line writes results: JSON or plain tables on standard output."""

from __future__ import annotations

import json
import math
import sys
from collections.abc import Sequence
from typing import Any

from ..stats.results import to_jsonable

__all__ = ["add_format_option", "emit_json", "emit_text", "fmt", "note", "render_table"]


def add_format_option(parser: Any) -> None:
    parser.add_argument("--format", choices=("table", "json"), default="table",
                        help="table (default, for people) or json (for programs) on standard "
                        "output")


def emit_json(data: Any) -> None:
    """JSON on standard output; non-finite numbers become null."""
    json.dump(to_jsonable(data), sys.stdout, indent=2, allow_nan=False, ensure_ascii=False)
    sys.stdout.write("\n")


def emit_text(text: str) -> None:
    sys.stdout.write(text if text.endswith("\n") else text + "\n")


def note(text: str) -> None:
    """A message for the person at the terminal (standard error)."""
    print(text, file=sys.stderr)


def fmt(value: Any, digits: int = 6) -> str:
    """A number in a short readable form; blanks for missing values."""
    if value is None:
        return "—"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return f"{value:,}"
    if isinstance(value, float):
        if math.isnan(value):
            return "—"
        if math.isinf(value):
            return "∞" if value > 0 else "-∞"
        if value != 0 and (abs(value) >= 1e7 or abs(value) < 1e-4):
            return f"{value:.{digits - 2}e}"
        return f"{value:.{digits}g}"
    return str(value)


def render_table(headers: Sequence[str], rows: Sequence[Sequence[Any]], *,
                 indent: int = 2, numeric: Sequence[bool] | None = None) -> str:
    """Columns separated by two spaces; numbers right-aligned, text left-aligned."""
    cells = [[fmt(v) if not isinstance(v, str) else v for v in row] for row in rows]
    if numeric is None:
        numeric = [all(not isinstance(row[i], str) for row in rows) if rows else False
                   for i in range(len(headers))]
    widths = [max([len(h)] + [len(r[i]) for r in cells]) for i, h in enumerate(headers)]
    pad = " " * indent

    def line(values: Sequence[str]) -> str:
        parts = [v.rjust(w) if numeric[i] else v.ljust(w) for i, (v, w) in
                 enumerate(zip(values, widths, strict=True))]
        return (pad + "  ".join(parts)).rstrip()

    out = [line(list(headers)), pad + "  ".join("-" * w for w in widths)]
    out.extend(line(r) for r in cells)
    return "\n".join(out)
