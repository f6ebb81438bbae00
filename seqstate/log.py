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
from collections.abc import Callable
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
    second (a background ticker redraws it even while a long kernel runs).  In a log
    (``live=False``) a plain ``progress:`` line is written ``first`` seconds after the
    start (5 s by default, so a log shows within 10 s that the run is alive) and then
    once every ``interval`` seconds (a minute by default), so cluster logs show life
    without filling up.  The line names the task (``annotate``, ``calibrate``), the
    record being worked on, the bases done of the run's total, the rate and the time
    left.

    :meth:`start` sets the total; :meth:`working` says which record is being worked
    on and how many of its bases the next :meth:`advance` calls will complete;
    :meth:`advance` adds bases done (from any thread); :meth:`finish` ends the line and
    stops the ticker.  While bases announced by :meth:`working` are pending, the
    line moves on at the rate measured so far (to 99 % of the pending bases), so a
    record whose work is reported in a few large steps does not stall the line and
    its time left.  ``clock`` (seconds, for tests) and ``ticker=False`` (no background
    thread: the caller calls :meth:`poll`) make the timing testable without sleeping.
    """

    def __init__(
        self,
        stream: TextIO | None = None,
        *,
        live: bool = True,
        interval: float | None = None,
        first: float | None = None,
        task: str = "",
        clock: Callable[[], float] | None = None,
        ticker: bool = True,
    ) -> None:
        self.stream = stream
        self.live = live
        self.interval = interval if interval is not None else (1.0 if live else 60.0)
        self.first = first if first is not None else (self.interval if live else 5.0)
        self.task = task
        self.clock = clock if clock is not None else _perf_counter
        self.use_ticker = ticker
        self.total = 1
        self.done = 0
        self.what = ""
        self.t0 = self.clock()
        self._pending = 0
        self._last_event = self.t0
        self._lock = threading.Lock()
        self._ticker: threading.Thread | None = None
        self._stop = threading.Event()
        self._last_draw = self.t0
        self._drawn = False

    def start(self, total_bases: int) -> None:
        """Begin counting towards ``total_bases`` (0 or less: not known yet)."""
        with self._lock:
            self.total = max(0, total_bases)
            self.done = 0
            self._pending = 0
            self.t0 = self._last_event = self._last_draw = self.clock()
        if self.use_ticker and self._ticker is None:
            self._stop.clear()
            self._ticker = threading.Thread(
                target=self._tick, name="seqstate-progress", daemon=True
            )
            self._ticker.start()

    def set_total(self, total_bases: int) -> None:
        """The run's total became known (or grew): bases of every record seen so far."""
        with self._lock:
            self.total = max(0, total_bases)

    def working(self, what: str, bases: int) -> None:
        """Work on ``what`` (a record) began: ``bases`` of it are done by later
        :meth:`advance` calls."""
        with self._lock:
            self.what = what
            if self._pending == 0:
                self._last_event = self.clock()
            self._pending += max(0, bases)

    def advance(self, bases: int, what: str) -> None:
        """``bases`` more are done (``what``: the record being worked on)."""
        with self._lock:
            self.done += bases
            self._pending = max(0, self._pending - bases)
            self.what = what
            now = self._last_event = self.clock()
            due = self.live and now - self._last_draw >= 0.2
        if due:
            self._draw()

    def _figures(self) -> tuple[float, float]:
        """(bases shown as done, rate in bases per second; 0: not measured yet).

        Bases announced by :meth:`working` and not yet done are shown as done at the
        rate measured up to the last :meth:`advance` (never more than 99 % of those pending);
        the rate shown is the bases shown over the time since the start."""
        now = self.clock()
        spent = self._last_event - self.t0
        measured = self.done / spent if self.done > 0 and spent > 0 else 0.0
        # short of the pending bases by 1 %: the line reaches 100 % only when they are done
        ahead = min(0.99 * self._pending, measured * max(0.0, now - self._last_event))
        shown = self.done + ahead
        if self.total > 0:
            shown = min(shown, max(self.total, self.done))
        elapsed = now - self.t0
        return shown, (shown / elapsed if shown > 0 and elapsed > 0 else 0.0)

    def line(self) -> str:
        """The progress text as it is now (no line end)."""
        with self._lock:
            shown, rate = self._figures()
            total, what = self.total, self.what
        head = " ".join(x for x in (self.task, what) if x)
        text = f"{head}: " if head else ""
        text += f"{shown / 1e6:.2f}"
        if total > 0:
            text += f"/{total / 1e6:.2f} Mbp ({int(100.0 * min(shown, total) / total)}%)"
        else:
            text += " Mbp"
        if rate > 0:
            text += f", {rate / 1e6:.2f} Mbp/s"
            if total > 0 and shown < total:
                text += f", {_duration((total - shown) / rate)} left"
        return text

    def poll(self) -> bool:
        """Draw the line if it is due (``first`` seconds after the start, then every
        ``interval``); True if it was drawn.  The ticker calls this once a second."""
        with self._lock:
            wait = self.interval if self._drawn else self.first
            due = self.clock() - self._last_draw >= wait
        if due:
            self._draw()
        return due

    def _draw(self) -> None:
        stream = self.stream or _stderr()
        text = self.line()
        with self._lock:
            self._last_draw = self.clock()
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
        while not self._stop.wait(min(self.interval, self.first, 1.0) or 1.0):
            self.poll()

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


def _perf_counter() -> float:
    """The default clock of :class:`Progress` (looked up at each call, so tests can
    replace ``time``)."""
    return time.perf_counter()


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

    def __init__(self, *args, **kwargs) -> None:
        super().__init__(*args, **kwargs)
        self.use_ticker = False

    def advance(self, bases: int, what: str) -> None:
        with self._lock:
            self.done += bases
            self._pending = max(0, self._pending - bases)
            self.what = what

    def poll(self) -> bool:
        return False

    def finish(self) -> None:
        pass


def progress_for(quiet: bool, task: str = "") -> Progress:
    """The progress a run shows: none with ``-q``; a live line on a terminal; else a plain
    ``progress:`` line after 5 s, then one a minute (logs of batch jobs).  ``task``: the
    command's name, at the head of the line."""
    if quiet:
        return QuietProgress(task=task)
    return Progress(live=_stderr().isatty(), task=task)
