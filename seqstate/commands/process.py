"""A command as a process: stop signals and a standard output that fails.

A stop signal (SIGINT, SIGTERM, SIGHUP) raises :class:`Interrupted` in the main
thread; :func:`seqstate.io.atomic.note_stop` makes sure no output set commits
after it.  The CLI maps :class:`Interrupted` to one ``error: interrupted`` line
and exit :data:`EXIT_INTERRUPTED`.
"""

from __future__ import annotations

import contextlib
import io
import os
import signal
import sys
from collections.abc import Iterator
from types import FrameType
from typing import Any, NoReturn

from seqstate.errors import UsageError
from seqstate.io.atomic import note_stop, write_failure

EXIT_INTERRUPTED = 130
#: Signals that stop a run: outputs are discarded, one ``error: interrupted`` line, exit 130.
STOP_SIGNALS = tuple(
    getattr(signal, n) for n in ("SIGINT", "SIGTERM", "SIGHUP") if hasattr(signal, n)
)


class Interrupted(BaseException):
    """Raised by the handler of a stop signal (not an Exception: nothing swallows it)."""


def _interrupt(signum: int, frame: FrameType | None) -> NoReturn:
    note_stop(signum)  # sticky: no output set commits, even if this raise is swallowed
    raise Interrupted(signum)


@contextlib.contextmanager
def signal_handlers() -> Iterator[None]:
    """SIGINT, SIGTERM and SIGHUP raise :class:`Interrupted`; SIGXFSZ is ignored, so a
    file-size limit is a write error (OSError EFBIG), not a kill.  Restored afterwards."""
    saved: dict[int, Any] = {}
    wanted: dict[int, Any] = {s: _interrupt for s in STOP_SIGNALS}
    if hasattr(signal, "SIGXFSZ"):
        wanted[signal.SIGXFSZ] = signal.SIG_IGN
    for signum, handler in wanted.items():
        try:
            saved[signum] = signal.signal(signum, handler)
        except (ValueError, OSError):  # not the main thread
            pass
    previous_hook = sys.unraisablehook
    sys.unraisablehook = _quiet_interrupts(previous_hook)
    try:
        yield
    finally:
        sys.unraisablehook = previous_hook
        for signum, handler in saved.items():
            with contextlib.suppress(ValueError, OSError, TypeError):
                signal.signal(signum, handler)


def _quiet_interrupts(hook: Any) -> Any:
    """An unraisable-exception hook that drops :class:`Interrupted`.

    A signal that arrives while the main thread runs Python code called back from C
    (numba's compiler, ctypes) raises there, where Python can only print it as
    "Exception ignored ...".  The stop is already recorded (:func:`note_stop`), so the
    run still ends with ``error: interrupted`` and nothing committed; the stray report
    would only garble stderr.  Every other unraisable exception goes to ``hook``.
    """

    def quiet(unraisable: Any) -> None:
        if isinstance(getattr(unraisable, "exc_value", None), Interrupted):
            return
        hook(unraisable)

    return quiet


def silence_stdout() -> None:
    """After a failed write to standard output, keep the exit flush from failing again."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        os.close(devnull)
    except (OSError, ValueError, AttributeError, io.UnsupportedOperation):
        pass


def raise_stdout_failure(exc: OSError) -> None:
    """A failed write to standard output: one usage error (full device, quota), else ``exc``."""
    failure = write_failure(exc, "standard output")
    if failure is None:
        raise exc
    silence_stdout()
    raise UsageError(failure.message) from None
