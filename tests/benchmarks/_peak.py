"""Run a Python script in its own process; measure its wall time and its own peak memory.

Peak memory is the child's own high-water resident set, ``VmHWM`` from
``/proc/self/status``, which the child reports as it ends (:func:`own_peak_mb`).
It belongs to the child's address space after ``exec``.  ``ru_maxrss`` from
``wait4`` is kept for reference only: on Linux it also carries the parent's
resident set at the moment of the fork, so it is useless when the parent is big.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path


@dataclass(frozen=True, slots=True)
class Measured:
    returncode: int
    stdout: str
    stderr: str
    wall_seconds: float
    peak_rss_mb: float


def own_peak_mb() -> float:
    """This process's peak resident set (MB): VmHWM, else ru_maxrss where /proc is absent."""
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024.0
    except OSError:
        pass
    import resource

    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


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


def report_side(result: dict[str, object]) -> None:
    """In a measured child: print the side's result as JSON, with its own peak memory."""
    print(json.dumps({**result, "own_peak_mb": own_peak_mb()}))


def run_side(script: str, side: str, path: object) -> tuple[dict[str, object], Measured]:
    """Run one side of a benchmark in its own process; its result with ``peak_rss_mb``.

    The peak is the child's own VmHWM (see the module notes), never ``wait4``'s figure.
    """
    done = run_python(script, "--side", side, "--path", str(path))
    if done.returncode != 0:
        raise SystemExit(f"side {side} failed ({done.returncode}):\n{done.stderr}")
    result = json.loads(done.stdout.strip().splitlines()[-1])
    result["peak_rss_mb"] = result.pop("own_peak_mb")
    return result, done
