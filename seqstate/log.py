"""Everything seqstate says on stderr: progress, notes, warnings and the summary line.

Commands never write to stderr themselves: they are handed a :class:`Progress`
(or its quiet twin :class:`QuietProgress`) and call :func:`note`, :func:`warn`
and :func:`summary`.  The run header of a command is its first :func:`note`
(``fit: 2 record(s), ...``); the summary line ``seqstate: ...`` is its last.
Standard output carries only the data a command was asked to write there.
"""

from __future__ import annotations

import sys
import threading
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
    """Bases done, rate and time left on stderr, for long runs.

    On a terminal (``live=True``) one line is rewritten in place at least once a
    second (a background ticker redraws it even while a long kernel runs): the
    record being worked on, its bases done, the bases of the run, the rate and the
    time left.  In a log (``live=False``) a plain line is written once every
    ``interval`` seconds (a minute by default), so cluster logs show life without
    filling up.  :meth:`start` sets the total; :meth:`advance` adds bases (from any
    thread); :meth:`finish` ends the line and stops the ticker.
    """

    def __init__(
        self, stream: TextIO | None = None, *, live: bool = True, interval: float | None = None
    ) -> None:
        self.stream = stream
        self.live = live
        self.interval = interval if interval is not None else (1.0 if live else 60.0)
        self.total = 1
        self.done = 0
        self.what = ""
        self.t0 = time.perf_counter()
        self._lock = threading.Lock()
        self._ticker: threading.Thread | None = None
        self._stop = threading.Event()
        self._last_draw = 0.0
        self._drawn = False

    def start(self, total_bases: int) -> None:
        """Begin counting towards ``total_bases`` (0 or less: not known yet)."""
        with self._lock:
            self.total = max(0, total_bases)
            self.done = 0
            self.t0 = time.perf_counter()
            self._last_draw = self.t0
        if self._ticker is None:
            self._stop.clear()
            self._ticker = threading.Thread(
                target=self._tick, name="seqstate-progress", daemon=True
            )
            self._ticker.start()

    def set_total(self, total_bases: int) -> None:
        """The run's total became known (or grew): bases of every record seen so far."""
        with self._lock:
            self.total = max(0, total_bases)

    def advance(self, bases: int, what: str) -> None:
        """``bases`` more are done (``what``: the record being worked on)."""
        with self._lock:
            self.done += bases
            self.what = what
            now = time.perf_counter()
            due = self.live and now - self._last_draw >= 0.2
        if due:
            self._draw()

    def line(self) -> str:
        """The progress text as it is now (no line end)."""
        with self._lock:
            done, total, what = self.done, self.total, self.what
            dt = max(time.perf_counter() - self.t0, 1e-9)
        rate = done / dt
        text = f"{what}: {done / 1e6:.2f}"
        if total > 0:
            text += f"/{total / 1e6:.2f} Mbp ({100.0 * min(done, total) / total:.0f}%)"
        else:
            text += " Mbp"
        text += f", {rate / 1e6:.2f} Mbp/s"
        if total > 0 and rate > 0 and done < total:
            text += f", {_duration((total - done) / rate)} left"
        return text

    def _draw(self) -> None:
        stream = self.stream or _stderr()
        text = self.line()
        with self._lock:
            self._last_draw = time.perf_counter()
            self._drawn = True
        try:
            if self.live:
                stream.write(f"\r{text}   ")
            else:
                stream.write(f"progress: {text}\n")
            stream.flush()
        except (OSError, ValueError):
            pass

    def _tick(self) -> None:
        while not self._stop.wait(min(self.interval, 1.0)):
            with self._lock:
                due = time.perf_counter() - self._last_draw >= self.interval
            if due:
                self._draw()

    def finish(self) -> None:
        """End the progress line and stop the ticker."""
        self._stop.set()
        ticker, self._ticker = self._ticker, None
        if ticker is not None:
            ticker.join(timeout=2.0)
        if self.live and self._drawn:
            stream = self.stream or _stderr()
            try:
                stream.write("\n")
                stream.flush()
            except (OSError, ValueError):
                pass


def _duration(seconds: float) -> str:
    """``42 s``, ``3 min 5 s``, ``2 h 10 min``."""
    s = int(round(seconds))
    if s < 60:
        return f"{s} s"
    if s < 3600:
        return f"{s // 60} min {s % 60} s"
    return f"{s // 3600} h {(s % 3600) // 60} min"


class QuietProgress(Progress):
    """The silent twin of :class:`Progress`: counts, writes nothing, runs no ticker."""

    def start(self, total_bases: int) -> None:
        with self._lock:
            self.total = max(0, total_bases)
            self.done = 0
            self.t0 = time.perf_counter()

    def advance(self, bases: int, what: str) -> None:
        with self._lock:
            self.done += bases
            self.what = what

    def finish(self) -> None:
        pass


def progress_for(quiet: bool) -> Progress:
    """The progress a run shows: none with ``-q``; a live line on a terminal; else a plain
    ``progress:`` line a minute (logs of batch jobs)."""
    if quiet:
        return QuietProgress()
    return Progress(live=_stderr().isatty())
