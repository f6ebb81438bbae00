"""The ``seqstate`` program's entry point: stop signals handled from the first line.

The command line (:mod:`seqstate.cli`) imports NumPy, numba and click, which takes a
noticeable fraction of a second; a stop signal (SIGINT, SIGTERM, SIGHUP) arriving
then, or after the run has committed its outputs and put its handlers away, would
otherwise end the process by the signal itself.  This module imports only the
standard library, installs a handler for those signals before anything else, and
keeps one installed until the process exits, so that every stop signal received once
the program is running ends it the same way: one ``error: interrupted`` line on
standard error and exit code 130.  A signal that arrives after the outputs were
committed leaves them complete (the commit is done); the exit code still says the
run was stopped.
"""

from __future__ import annotations

import signal
import sys
from collections.abc import Callable
from types import FrameType
from typing import NoReturn

EXIT_INTERRUPTED = 130
_NAMES = ("SIGINT", "SIGTERM", "SIGHUP")
#: The stop signals of this platform.
STOP_SIGNALS = tuple(getattr(signal, n) for n in _NAMES if hasattr(signal, n))
#: Stop signals received outside the command's own handlers.
_RECEIVED: list[int] = []


class EarlyStop(BaseException):
    """A stop signal outside the command's own handlers (while starting or ending)."""


def _early(signum: int, frame: FrameType | None) -> NoReturn:
    _RECEIVED.append(signum)
    raise EarlyStop(signum)


def _interrupted() -> NoReturn:
    _block()
    try:
        sys.stderr.write("error: interrupted\n")
        sys.stderr.flush()
    except (OSError, ValueError):
        pass
    raise SystemExit(EXIT_INTERRUPTED)


def _block() -> None:
    """Hold back further stop signals until the process exits (they are then dropped)."""
    try:
        signal.pthread_sigmask(signal.SIG_BLOCK, STOP_SIGNALS)
    except (AttributeError, OSError, ValueError):  # no pthread_sigmask on this platform
        for signum in STOP_SIGNALS:
            try:
                signal.signal(signum, signal.SIG_IGN)
            except (OSError, ValueError):
                pass


def run(command: Callable[[], object]) -> NoReturn:
    """Run ``command`` (the command line) with stop signals handled throughout.

    The command's own handlers (see :func:`seqstate.commands.process.signal_handlers`)
    take over while it runs and give this module's handler back when done.  Exits with
    the command's exit code, or 130 if a stop signal came at any point.
    """
    code: object = 0
    try:
        for signum in STOP_SIGNALS:
            try:
                signal.signal(signum, _early)
            except (OSError, ValueError):  # not the main thread
                pass
        try:
            command()
        except SystemExit as exc:
            code = exc.code
        _block()
    except EarlyStop:
        _interrupted()
    if _RECEIVED and code != EXIT_INTERRUPTED:  # the command has not said so already
        _interrupted()
    raise SystemExit(code)


def _command_line() -> None:
    from seqstate.cli import main as command_line

    command_line()


def main() -> NoReturn:
    """The ``seqstate`` program (console script and ``python -m seqstate``)."""
    run(_command_line)
