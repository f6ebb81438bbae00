"""Everything seqstate says on stderr: progress, notes, warnings and the summary line.

Commands never write to stderr themselves: they are handed a :class:`Progress`
(or its quiet twin :class:`QuietProgress`) and call :func:`note`, :func:`warn`
and :func:`summary`.  The run header of a command is its first :func:`note`
(``fit: 2 record(s), ...``); the summary line ``seqstate: ...`` is its last.
Standard output carries only the data a command was asked to write there.
"""

from __future__ import annotations

import sys
import time
from typing import TextIO


def _stderr() -> TextIO:
    return sys.stderr  # looked up at each call: test runners replace sys.stderr


def note(line: str) -> None:
    """One line on stderr, as it is (progress notes such as ``fit: iteration 3 ...``)."""
    stream = _stderr()
    stream.write(line + "\n")
    stream.flush()


def warn(text: str) -> None:
    """One ``warning: TEXT`` line on stderr (the run goes on)."""
    note(f"warning: {text}")


def summary(text: str) -> None:
    """The one-line summary a command prints when it is done: ``seqstate: TEXT``."""
    note(f"seqstate: {text}")


class Progress:
    """Bases done, rate and time left, rewritten in place on stderr.

    :meth:`start` sets the total; :meth:`advance` adds bases and redraws;
    :meth:`finish` ends the line.
    """

    def __init__(self, stream: TextIO | None = None) -> None:
        self.stream = stream
        self.total = 1
        self.done = 0
        self.t0 = time.perf_counter()

    def start(self, total_bases: int) -> None:
        """Begin counting towards ``total_bases``."""
        self.total = max(1, total_bases)
        self.done = 0
        self.t0 = time.perf_counter()

    def advance(self, bases: int, what: str) -> None:
        """``bases`` more are done (``what``: the record being worked on)."""
        self.done += bases
        dt = max(time.perf_counter() - self.t0, 1e-9)
        rate = self.done / dt
        left = (self.total - self.done) / rate if rate > 0 else 0.0
        stream = self.stream or _stderr()
        stream.write(
            f"\r{what}: {self.done / 1e6:.2f}/{self.total / 1e6:.2f} Mbp, "
            f"{rate / 1e6:.2f} Mbp/s, {left:.0f} s left   "
        )
        stream.flush()

    def finish(self) -> None:
        """End the progress line."""
        stream = self.stream or _stderr()
        stream.write("\n")
        stream.flush()


class QuietProgress(Progress):
    """The silent twin of :class:`Progress`: counts, writes nothing."""

    def advance(self, bases: int, what: str) -> None:
        self.done += bases

    def finish(self) -> None:
        pass


def progress_for(quiet: bool) -> Progress:
    """A :class:`Progress` when a person watches stderr (a terminal, not ``-q``), else quiet."""
    return QuietProgress() if quiet or not _stderr().isatty() else Progress()
