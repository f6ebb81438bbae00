"""Stop signals, test hold points, folder locks and the recovery of staging folders.

What :class:`seqstate.io.atomic.OutputSet` needs around its commit: stop signals
noted for the run (:func:`note_stop`, :func:`stop_requested`) and held back during
a commit (:func:`held_signals`); the test-only hold points (:func:`hold_point`,
``SEQSTATE_TEST_HOLD``); advisory locks on output folders; and
:func:`recover_folder`, which finishes or removes the staging folders
(``.seqstate-stage-PID``) that dead runs left behind.
"""

from __future__ import annotations

import contextlib
import fcntl
import json
import os
import re
import shutil
import signal
import time
from collections.abc import Iterable, Iterator
from contextlib import contextmanager
from pathlib import Path
from types import FrameType

__all__ = [
    "JOURNAL",
    "STAGE_PREFIX",
    "held_signals",
    "hold_point",
    "note_stop",
    "recover_folder",
    "stop_requested",
]

STAGE_PREFIX = ".seqstate-stage-"
JOURNAL = "COMMIT"
_STAGE_RE = re.compile(r"^\.seqstate-stage-([0-9]+)$")
_OLD_TEMP_RE = re.compile(r"^\..+\.tmp-([0-9]+)$")
_HELD = tuple(getattr(signal, n) for n in ("SIGINT", "SIGTERM", "SIGHUP") if hasattr(signal, n))


#: Stop signals received by this process (see :func:`note_stop`); sticky for the run.
_STOPS: list[int] = []


def note_stop(signum: int) -> None:
    """Record that a stop signal arrived.  No output set commits after this.

    The signal handler also raises, but Python may run a handler where the exception
    is swallowed (inside a weakref or import callback); the note makes sure such a
    run still ends without committing its outputs.
    """
    _STOPS.append(signum)


def stop_requested() -> bool:
    """True once :func:`note_stop` has been called in this process."""
    return bool(_STOPS)


#: Test-only: ``SEQSTATE_TEST_HOLD=POINT:FLAGFILE`` (read once) holds the run at ``POINT``.
_HOLD_ENV = "SEQSTATE_TEST_HOLD"
_HOLD: list[tuple[str, str] | None] = []
_HOLD_SECONDS = 120.0


def hold_point(point: str) -> None:
    """Test-only hook; does nothing unless ``SEQSTATE_TEST_HOLD`` is set.

    With ``SEQSTATE_TEST_HOLD=POINT:FLAGFILE`` (read on the first call), the first time
    the run reaches ``point`` it writes its process id to ``FLAGFILE`` (atomically)
    and waits there until a stop signal has been noted (:func:`note_stop`; in the
    main thread the signal's exception ends the wait), at most two minutes.  Tests
    use it to send a signal at a known moment instead of after a guessed sleep.
    Points: ``commit`` (every file staged, just before the commit) and
    ``record-written`` (a record's outputs written to the staged files).
    """
    if not _HOLD:
        name, sep, flag = os.environ.get(_HOLD_ENV, "").partition(":")
        _HOLD.append((name, flag) if sep and name and flag else None)
    held = _HOLD[0]
    if held is None or held[0] != point:
        return
    _HOLD[0] = None  # once per process
    part = f"{held[1]}.part"
    with open(part, "w", encoding="utf-8") as handle:
        handle.write(f"{os.getpid()}\n")
    os.replace(part, held[1])
    deadline = time.monotonic() + _HOLD_SECONDS
    while not stop_requested() and time.monotonic() < deadline:
        time.sleep(0.005)


@contextmanager
def held_signals() -> Iterator[None]:
    """Hold back SIGINT, SIGTERM and SIGHUP in this block; a pending one acts after it.

    The signals' handlers are swapped for one that only takes note (Python runs
    handlers in the main thread, whatever thread the system picks); on leaving,
    the handlers are restored and the first signal noted is raised again.
    Outside the main thread nothing is held.
    """
    pending: list[int] = []

    def note(signum: int, frame: FrameType | None) -> None:
        pending.append(signum)

    saved = {}
    for signum in _HELD:
        try:
            saved[signum] = signal.signal(signum, note)
        except (ValueError, OSError):  # not the main thread
            break
    try:
        yield
    finally:
        for signum, handler in saved.items():
            signal.signal(signum, signal.SIG_DFL if handler is None else handler)
        if pending:
            signal.raise_signal(pending[0])


@contextmanager
def _locked(folders: Iterable[Path]) -> Iterator[None]:
    """Exclusive advisory locks on folders (sorted, so two runs never deadlock)."""
    fds = []
    try:
        for folder in sorted(set(folders), key=str):
            try:
                fd = os.open(folder, os.O_RDONLY)
            except OSError:
                continue
            fds.append(fd)
            try:
                fcntl.flock(fd, fcntl.LOCK_EX)
            except OSError:
                pass
        yield
    finally:
        for fd in fds:
            with contextlib.suppress(OSError):
                fcntl.flock(fd, fcntl.LOCK_UN)
            os.close(fd)


def _alive(pid: int) -> bool:
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except (PermissionError, OverflowError, OSError):
        return True
    return True


def _roll_forward(folder: Path, stage: Path) -> None:
    try:
        names = json.loads((stage / JOURNAL).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return
    if not isinstance(names, list):
        return
    for name in names:
        if isinstance(name, str) and "/" not in name and (stage / name).is_file():
            with contextlib.suppress(OSError):
                os.replace(stage / name, folder / name)


def recover_folder(folder: str | os.PathLike, names: Iterable[str] = ()) -> list[str]:
    """Finish or remove what dead seqstate runs left in ``folder``; returns the entries.

    A staging folder (``.seqstate-stage-PID``) of a dead process with a complete
    journal is committed (its files renamed into place), any other one deleted.
    Temporary files of older versions (``.NAME.tmp-PID``) are deleted only for
    the given output ``names``, so files of other programs in a shared folder
    are never touched.  Entries of live processes are left alone.
    """
    folder = Path(folder)
    wanted = set(names)
    done: list[str] = []
    try:
        entries = list(os.scandir(folder))
    except OSError:
        return done
    for entry in entries:
        stage = _STAGE_RE.match(entry.name)
        old = _OLD_TEMP_RE.match(entry.name)
        if old and entry.name[1 : old.start(1) - len(".tmp-")] not in wanted:
            old = None
        match = stage or old
        if match is None or _alive(int(match.group(1))):
            continue
        path = Path(entry.path)
        try:
            if stage and entry.is_dir(follow_symlinks=False):
                if (path / JOURNAL).is_file():
                    _roll_forward(folder, path)
                shutil.rmtree(path)
                done.append(entry.name)
            elif old and entry.is_file(follow_symlinks=False):
                path.unlink()
                done.append(entry.name)
        except OSError:
            continue
    return done
