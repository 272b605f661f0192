"""Run a Python script in its own process; measure its wall time and its own peak memory.

The peak resident set size comes from ``os.wait4``, which returns the resource
usage of exactly that child (``ru_maxrss``, kilobytes on Linux), so each side of
a benchmark is measured alone, whatever else the parent ran before.
"""

from __future__ import annotations

import os
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass


@dataclass(frozen=True, slots=True)
class Measured:
    returncode: int
    stdout: str
    stderr: str
    wall_seconds: float
    peak_rss_mb: float


def run_python(script: str, *arguments: str) -> Measured:
    """Run ``python script arguments...`` and measure that process only."""
    with tempfile.TemporaryFile("w+") as out, tempfile.TemporaryFile("w+") as err:
        started = time.perf_counter()
        child = subprocess.Popen([sys.executable, script, *arguments], stdout=out, stderr=err,
                                 text=True)
        _, status, usage = os.wait4(child.pid, 0)
        wall = time.perf_counter() - started
        child.returncode = os.waitstatus_to_exitcode(status)
        out.seek(0)
        err.seek(0)
        return Measured(child.returncode, out.read(), err.read(), wall,
                        usage.ru_maxrss / 1024.0)
