"""The folders are the layers: imports point down only (DEVELOPERS.md, 'Layout')."""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]

#: what the computation core must never import: I/O libraries and the upper layers
CORE_FORBIDDEN = ("pyarrow", "sqlalchemy", "apscheduler", "storage", "monitor.runs",
                  "monitor.cli", "monitor.report", "monitor._frames", "matplotlib",
                  "logging", "urllib", "smtplib", "requests")


def _imports(path: Path) -> list[str]:
    tree = ast.parse(path.read_text(encoding="utf-8"))
    package = ".".join(path.relative_to(ROOT).with_suffix("").parts[:-1])
    names: list[str] = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names.extend(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[: len(base) - node.level + 1]
                names.append(".".join([*base, node.module] if node.module else base))
            elif node.module:
                names.append(node.module)
    return names


def _violations(folder: str, forbidden: tuple[str, ...]) -> list[str]:
    found = []
    for path in sorted((ROOT / folder).rglob("*.py")):
        for name in _imports(path):
            if any(name == bad or name.startswith(bad + ".") for bad in forbidden):
                found.append(f"{path.relative_to(ROOT)} imports {name}")
    return found


def test_the_core_imports_no_io_library_and_no_upper_layer() -> None:
    assert _violations("monitor/stats", CORE_FORBIDDEN) == []


@pytest.mark.parametrize("folder", ["storage"])
def test_storage_imports_nothing_of_monitor_but_its_errors(folder: str) -> None:
    found = []
    for path in sorted((ROOT / folder).rglob("*.py")):
        for name in _imports(path):
            if (name == "monitor" or name.startswith("monitor.")) and name != "monitor.errors":
                found.append(f"{path.relative_to(ROOT)} imports {name}")
    assert found == []


def test_the_example_pipeline_uses_only_the_public_faces() -> None:
    allowed = ("monitor", "monitor.errors", "monitor.report", "monitor.runs._build",
               "monitor.runs.spec")
    found = []
    for path in sorted((ROOT / "example_pipeline").rglob("*.py")):
        for name in _imports(path):
            if name.startswith("monitor") and name not in allowed:
                found.append(f"{path.relative_to(ROOT)} imports {name}")
    assert found == []
