"""What every benchmark script prints first: the command that ran and the machine it ran on.

Imported by the scripts of this folder (run them from the repository root with
``PYTHONPATH=.``); not part of the package.
"""

from __future__ import annotations

import datetime
import os
import platform
import shlex
import sys
from pathlib import Path


def cpu_name() -> str:
    """The processor's model name (``/proc/cpuinfo``), else what :mod:`platform` knows."""
    try:
        with open("/proc/cpuinfo") as fh:
            for line in fh:
                if line.startswith("model name"):
                    return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or platform.machine()


def machine_line() -> str:
    """CPU, cores, load average, Python, numpy, numba and seqstate versions, today's date."""
    import numba
    import numpy

    import seqstate

    try:
        load = "load average {:.1f} {:.1f} {:.1f}".format(*os.getloadavg())
    except OSError:
        load = "load average unknown"
    return (
        f"{cpu_name()}, {os.cpu_count()} cores, {load}, Python {platform.python_version()}, "
        f"numpy {numpy.__version__}, numba {numba.__version__}, seqstate {seqstate.__version__}, "
        f"{datetime.date.today().isoformat()}"
    )


def print_header() -> None:
    """Print ``command: ...`` (as typed, with the script's path) and ``machine: ...``."""
    print("command:", shlex.join([Path(sys.executable).name, *sys.argv]), flush=True)
    print("machine:", machine_line(), flush=True)


def markdown_table(head: list[str], rows: list[list[str]]) -> str:
    """A Markdown table: ``head`` then one line per row (cells already formatted)."""
    lines = ["| " + " | ".join(head) + " |", "|" + "---|" * len(head)]
    lines += ["| " + " | ".join(row) + " |" for row in rows]
    return "\n".join(lines)


def run_child(cmd: list[str]) -> tuple[float, float]:
    """Wall seconds and peak RSS (MiB) of one child process (its own rusage, via wait4);
    exits with the child's standard error when it fails.  Standard error is read before
    the wait, so a child that writes much of it cannot stall on a full pipe."""
    import subprocess
    import time

    t0 = time.perf_counter()
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    assert proc.stderr is not None
    err = proc.stderr.read().decode(errors="replace")
    _, status, usage = os.wait4(proc.pid, 0)
    wall = time.perf_counter() - t0
    if os.waitstatus_to_exitcode(status) != 0:
        sys.exit(f"benchmark child failed: {' '.join(cmd)}\n{err}")
    return wall, usage.ru_maxrss / 1024.0
