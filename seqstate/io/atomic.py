"""Safe outputs: the overwrite rule, and all-or-nothing output sets.

The rule (:func:`check_outputs`), the same for every command:

- an output that already exists is replaced only with ``force`` (``--force``);
- an output that is also an input (the same file, by :func:`os.path.samefile`
  or by resolved path), or two outputs of one run that are the same path, is
  always refused, ``force`` or not;
- an output name that is empty or names a folder is refused.

The commit (:class:`OutputSet`): every file of a run is written into a hidden
staging folder ``.seqstate-stage-PID/`` inside the folder the file goes to.
When the ``with`` block ends without an exception the run commits: with
SIGINT, SIGTERM and SIGHUP held back and the output folder locked against
other seqstate runs, a journal (``COMMIT``, the list of names) is written into
each staging folder, then each file is renamed into place (:func:`os.replace`,
atomic per file), an existing file being kept as a hard link in the staging
folder until the end.  Guarantee:

- on any exception or signal before or during the commit, every output keeps
  its previous content (files renamed so far are put back) and the staging
  folder is removed: the folder never holds a mix of two runs' files;
- a signal that arrives during the commit is acted on once it has finished;
- if the process is killed outright (SIGKILL, power loss) the staging folder
  stays behind; the next run that writes into the same folder finishes the
  commit if the journal was complete (every file of the set was already
  written) and otherwise deletes the staging folder; a run that writes NAME
  also deletes ``.NAME.tmp-PID`` files that older versions left.  A run whose
  process id is still alive is never touched.

Files of the folder that a run does not write are never touched, with one exception:
a set told the name of its run report (:meth:`OutputSet.replaces_set_of`) and run with
``force`` replaces the whole earlier set that report owns.  The files the earlier report
lists that this set does not write are removed in the same commit (and put back if it
fails), but only those still holding the bytes that report recorded (``output_sha256``):
a file changed since, or listed without a checksum, is kept.
"""

from __future__ import annotations

import contextlib
import errno
import fcntl
import json
import os
import re
import shutil
import signal
import time
from collections.abc import Callable, Iterable, Iterator
from contextlib import contextmanager
from pathlib import Path
from types import FrameType, TracebackType
from typing import Literal, TextIO, TypeGuard

from seqstate.errors import UsageError

__all__ = [
    "STAGE_PREFIX",
    "OutputSet",
    "atomic_folder",
    "atomic_text",
    "check_outputs",
    "hold_point",
    "recover_folder",
    "same_file",
    "write_failure",
]

STAGE_PREFIX = ".seqstate-stage-"
JOURNAL = "COMMIT"
_BACKUP = ".old-"
#: Largest earlier run report read to find the set it owns (its files are listed there).
MAX_REPORT_BYTES = 64 * 1024 * 1024
#: A file name a run report may list as its own output: no folder part, not hidden.
_PLAIN_NAME = re.compile(r"[^/\\\x00.][^/\\\x00]*")


def _sha256(path: Path) -> str:
    import hashlib

    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        while block := fh.read(1 << 20):
            digest.update(block)
    return digest.hexdigest()


_STAGE_RE = re.compile(r"^\.seqstate-stage-([0-9]+)$")
_OLD_TEMP_RE = re.compile(r"^\..+\.tmp-([0-9]+)$")
_HELD = tuple(getattr(signal, n) for n in ("SIGINT", "SIGTERM", "SIGHUP") if hasattr(signal, n))
#: errno values that mean "the output cannot be written" (full disk, quota, size limit,
#: read-only file system, device error).
WRITE_ERRNOS = frozenset(
    e
    for e in (
        errno.ENOSPC,
        errno.EFBIG,
        getattr(errno, "EDQUOT", None),
        errno.EROFS,
        errno.EIO,
    )
    if e is not None
)


# ---------------------------------------------------------------- the overwrite rule
def _key(path: Path) -> str:
    return os.path.normcase(os.path.realpath(path))


def same_file(a: str | os.PathLike, b: str | os.PathLike) -> bool:
    """True if ``a`` and ``b`` are one file: :func:`os.path.samefile` when both exist,
    else the same path once symbolic links and ``..`` are resolved."""
    pa, pb = Path(a), Path(b)
    try:
        if pa.exists() and pb.exists():
            return os.path.samefile(pa, pb)
    except OSError:
        pass
    return _key(pa) == _key(pb)


def _usable(path: str | os.PathLike | None) -> TypeGuard[str | os.PathLike[str]]:
    return path is not None and str(path) != "-"


def check_outputs(
    outputs: Iterable[str | os.PathLike | None],
    inputs: Iterable[str | os.PathLike | None] = (),
    *,
    force: bool = False,
) -> None:
    """Apply the overwrite rule to one run's output files; raise UsageError (exit 2).

    ``outputs`` and ``inputs`` are file paths; ``None`` and ``"-"`` (standard
    input/output) are skipped.  See the module docstring for the rule.
    """
    outs = [Path(p) for p in outputs if _usable(p)]
    ins = [Path(p) for p in inputs if _usable(p)]
    for out in outs:
        if not str(out) or out.name in ("", ".", ".."):
            raise UsageError(f"output file '{out}' is not a file name")
    for i, out in enumerate(outs):
        for other in outs[:i]:
            if same_file(out, other):
                raise UsageError(
                    f"outputs '{other}' and '{out}' are the same file: give each output its "
                    "own name"
                )
        for inp in ins:
            if same_file(out, inp):
                raise UsageError(
                    f"output '{out}' is the input '{inp}': refusing to overwrite an input "
                    "(even with --force); choose another output name"
                )
        if out.is_dir():
            raise UsageError(f"output file '{out}' is a directory, expected a file name")
        if (out.exists() or out.is_symlink()) and not force:
            raise UsageError(f"output '{out}' already exists: use --force to replace it")


def write_failure(exc: OSError, what: str) -> UsageError | None:
    """The one-line error for an OSError that means ``what`` cannot be written, else None."""
    if exc.errno not in WRITE_ERRNOS:
        return None
    reason = exc.strerror or os.strerror(exc.errno or 0)  # errno is one of WRITE_ERRNOS
    return UsageError(f"{what} cannot be written: {reason}")


# ---------------------------------------------------------------- signals, locks, recovery
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


# ---------------------------------------------------------------- the output set
class OutputSet:
    """Context manager for the files one run writes, committed together on success.

    With ``out_dir`` (created with its parents on entering if absent) names
    are plain file names inside it; with ``out_dir=None`` they are paths, and
    the files may lie in several folders.  Each name is checked by
    :func:`check_outputs` against ``inputs`` and ``force`` when registered.
    Use :meth:`open_text` for text outputs and :meth:`path` for outputs
    written by another library (bigWig, figures).  See the module docstring for
    the commit and its guarantee.
    """

    def __init__(
        self,
        out_dir: str | os.PathLike | None = None,
        *,
        force: bool = False,
        inputs: Iterable[str | os.PathLike | None] = (),
    ) -> None:
        self.out_dir = Path(out_dir) if out_dir is not None else None
        self.force = force
        self.inputs = [p for p in inputs if _usable(p)]
        self._created: list[Path] = []
        self._temps: dict[Path, Path] = {}  # final path -> staged path
        self._shown: list[str] = []  # the output names as given
        self._stages: dict[Path, Path] = {}  # folder -> its staging folder
        self._handles: list[TextIO] = []
        self._entered = False
        self._report: str | None = None  # this set's run report (see replaces_set_of)

    # ------------------------------------------------------------ helpers

    def _fail(self, reason: object, folder: Path | None = None) -> UsageError:
        where = folder if folder is not None else self.out_dir
        return UsageError(f"output directory '{where}' cannot be written: {reason}")

    @staticmethod
    def _reason(exc: OSError) -> str:
        return exc.strerror or str(exc)

    def _make_folder(self, folder: Path) -> None:
        missing: list[Path] = []
        probe = folder
        while not probe.exists() and not probe.is_symlink():
            missing.append(probe)
            if probe.parent == probe:
                break
            probe = probe.parent
        try:
            folder.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            for p in missing:
                if p.is_dir():
                    self._created.append(p)
            self._remove_created()
            raise self._fail(self._reason(exc), folder) from None
        self._created.extend(missing)  # deepest first
        if not folder.is_dir():
            raise self._fail("it exists and is not a directory", folder)
        if not os.access(folder, os.W_OK | os.X_OK):
            self._remove_created()
            raise self._fail("permission denied", folder)

    def _stage_of(self, folder: Path) -> Path:
        key = Path(os.path.abspath(folder))
        if key not in self._stages:
            if self.out_dir is None:
                self._make_folder(folder)
            with _locked([folder]):
                recover_folder(folder)
            stage = folder / f"{STAGE_PREFIX}{os.getpid()}"
            try:
                if stage.exists():
                    shutil.rmtree(stage)
                stage.mkdir()
            except OSError as exc:
                raise self._fail(self._reason(exc), folder) from None
            self._stages[key] = stage
        return self._stages[key]

    def _register(self, name: str | os.PathLike) -> Path:
        if not self._entered:
            raise RuntimeError("OutputSet must be used as a context manager ('with')")
        text = str(name)
        if self.out_dir is not None:
            if not text or text in (".", "..") or "/" in text or os.sep in text:
                raise ValueError(f"output name {text!r} must be a plain file name")
            final = self.out_dir / text
        else:
            final = Path(text)
            if not text or final.name in ("", ".", ".."):
                raise UsageError(f"output file '{text}' is not a file name")
        key = Path(os.path.abspath(final))
        if key in self._temps or any(same_file(key, k) for k in self._temps):
            raise ValueError(f"output {text!r} was already opened in this output set")
        check_outputs([final], self.inputs, force=self.force)
        temp = self._stage_of(final.parent) / final.name
        self._temps[key] = temp
        self._shown.append(text)
        return temp

    # ------------------------------------------------------------ public API

    def final_path(self, name: str) -> Path:
        """Where ``name`` will be once the run has succeeded."""
        return self.out_dir / name if self.out_dir is not None else Path(name)

    def open_text(self, name: str | os.PathLike) -> TextIO:
        """Open a UTF-8 text output (``\\n`` line ends) under its staged name."""
        temp = self._register(name)
        try:
            handle = open(temp, "w", encoding="utf-8", newline="\n")
        except OSError as exc:
            raise self._fail(self._reason(exc), temp.parent.parent) from None
        self._handles.append(handle)
        return handle

    def path(self, name: str | os.PathLike) -> Path:
        """A staged path for a binary writer; renamed to ``name`` on success.

        The caller must create the file there before the ``with`` block ends.
        """
        return self._register(name)

    def scratch_dir(self) -> Path:
        """A folder for the run's own temporary files (spilled sequence, deferred output
        parts) inside the staging folder of ``out_dir``: never committed, removed with the
        staging folder on success, error or stop signal."""
        if not self._entered:
            raise RuntimeError("OutputSet must be used as a context manager ('with')")
        if self.out_dir is None:
            raise RuntimeError("scratch_dir needs an output folder")
        scratch = self._stage_of(self.out_dir) / "scratch"
        try:
            scratch.mkdir(exist_ok=True)
        except OSError as exc:
            raise self._fail(self._reason(exc)) from None
        return scratch

    def replaces_set_of(self, report_name: str) -> None:
        """With ``force``, this set replaces the whole earlier set of its run report.

        ``report_name`` is a plain file name in ``out_dir``: the run report this set
        writes, a JSON object whose ``outputs`` lists the set's file names and whose
        ``output_sha256`` maps them to their checksums.  If such a report from an
        earlier run is there at the commit, the files it lists that this set does not
        write, and that still hold the bytes it recorded, are removed with the commit.
        Two runs into one folder take turns for the commit, so the later one sees the
        earlier one's report.
        """
        if self.out_dir is None or "/" in report_name or os.sep in report_name:
            raise ValueError("replaces_set_of needs an output folder and a plain file name")
        self._report = report_name

    def _stale_outputs(self) -> list[Path]:
        """The files of the earlier set (see :meth:`replaces_set_of`) this set drops."""
        if not self.force or self._report is None or self.out_dir is None:
            return []
        try:
            with open(self.out_dir / self._report, "rb") as fh:
                data = fh.read(MAX_REPORT_BYTES + 1)
            if len(data) > MAX_REPORT_BYTES:
                return []
            doc = json.loads(data)
        except (OSError, ValueError, RecursionError):
            return []
        if not isinstance(doc, dict):
            return []
        listed, sums = doc.get("outputs"), doc.get("output_sha256")
        if not isinstance(listed, list) or not isinstance(sums, dict):
            return []
        keep = {Path(os.path.abspath(final)) for final in self._temps}
        stale: list[Path] = []
        for name in listed:
            if not isinstance(name, str) or not _PLAIN_NAME.fullmatch(name):
                continue
            path = self.out_dir / name
            key = Path(os.path.abspath(path))
            if key in keep or name == self._report or not isinstance(sums.get(name), str):
                continue
            if any(same_file(path, inp) for inp in self.inputs):
                continue
            try:
                if path.is_symlink() or not path.is_file() or _sha256(path) != sums[name]:
                    continue
            except OSError:
                continue
            stale.append(path)
        return stale

    def __enter__(self) -> OutputSet:
        if self.out_dir is not None:
            self._make_folder(self.out_dir)
        self._entered = True
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> Literal[False]:
        self._entered = False
        what = self._what()
        if exc_type is not None:
            self._discard()
            if isinstance(exc, OSError):
                failure = write_failure(exc, what)
                if failure is not None:
                    raise failure from None
            return False
        try:
            for handle in self._handles:
                handle.close()
        except OSError as error:
            self._discard()
            raise (write_failure(error, what) or self._fail(self._reason(error))) from None
        except BaseException:
            self._discard()
            raise
        missing = [str(final) for final, temp in self._temps.items() if not temp.exists()]
        if missing:
            self._discard()
            raise RuntimeError(f"outputs {missing} were never written to their temporary paths")
        try:
            hold_point("commit")
        except BaseException:
            self._discard()
            raise
        if stop_requested():  # a stop signal whose exception was swallowed on the way
            self._discard()
            raise KeyboardInterrupt
        self._commit()
        return False

    def _what(self) -> str:
        """How a write failure names this set: its folder, or its one file."""
        if self.out_dir is not None:
            return f"output folder '{self.out_dir}'"
        if len(self._shown) == 1:
            return f"output '{self._shown[0]}'"
        return "output"

    # ------------------------------------------------------------ commit and cleanup

    def _commit(self) -> None:
        folders = [stage.parent for stage in self._stages.values()]
        done: list[tuple[Path, Path | None]] = []  # (final, backup or None)
        with held_signals():
            try:
                with _locked(folders):
                    for stage in self._stages.values():
                        names = [t.name for t in self._temps.values() if t.parent == stage]
                        journal = stage / f".{JOURNAL}.part"
                        journal.write_text(json.dumps(names), encoding="utf-8")
                        os.replace(journal, stage / JOURNAL)
                    for stale in self._stale_outputs():
                        folder_stage = self._stages[Path(os.path.abspath(stale.parent))]
                        kept = folder_stage / f"{_BACKUP}{stale.name}"
                        os.link(stale, kept, follow_symlinks=False)
                        stale.unlink()
                        done.append((stale, kept))
                    for final, temp in self._temps.items():
                        backup = None
                        if final.exists() and not final.is_dir():
                            backup = temp.parent / f"{_BACKUP}{final.name}"
                            try:
                                os.link(final, backup, follow_symlinks=False)
                            except OSError:
                                shutil.copy2(final, backup, follow_symlinks=False)
                        os.replace(temp, final)
                        done.append((final, backup))
            except BaseException as error:
                for final, backup in reversed(done):
                    with contextlib.suppress(OSError):
                        if backup is not None:
                            os.replace(backup, final)
                        else:
                            final.unlink()
                self._discard()
                if isinstance(error, OSError):
                    raise self._fail(self._reason(error)) from None
                raise
            self._remove_stages()
            with contextlib.suppress(OSError):
                for folder in {final.parent for final in self._temps}:
                    names = [f.name for f in self._temps if f.parent == folder]
                    recover_folder(folder, names)  # temporary files of older versions
            self._temps.clear()
            self._handles.clear()

    def _remove_stages(self) -> None:
        for stage in self._stages.values():
            shutil.rmtree(stage, ignore_errors=True)
        self._stages.clear()

    def _discard(self) -> None:
        with held_signals():
            for handle in self._handles:
                with contextlib.suppress(OSError):
                    handle.close()
            self._remove_stages()
            self._handles.clear()
            self._temps.clear()
            self._remove_created()

    def _remove_created(self) -> None:
        for directory in self._created:  # deepest first
            try:
                directory.rmdir()
            except OSError:
                break  # not empty (or already gone): leave it and its parents
        self._created = []


@contextmanager
def atomic_text(
    path: str | os.PathLike,
    *,
    force: bool = False,
    inputs: Iterable[str | os.PathLike | None] = (),
) -> Iterator[TextIO]:
    """Write one text file all-or-nothing: ``with atomic_text("out.fa") as handle:``.

    The file is staged beside ``path`` (its folder is created if absent) and
    renamed to ``path`` only if the block succeeds; the overwrite rule applies
    (``force``, ``inputs``).  See :class:`OutputSet`.
    """
    target = Path(path)
    if not str(path) or not target.name or target.name in (".", ".."):
        raise UsageError(f"output file '{path}' is not a file name")
    if target.is_dir():
        raise UsageError(f"output file '{path}' is a directory, expected a file name")
    with OutputSet(force=force, inputs=inputs) as outputs:
        yield outputs.open_text(target)


def atomic_folder(
    folder: str | os.PathLike,
    texts: Iterable[tuple[str, str]],
    *,
    force: bool = False,
    inputs: Iterable[str | os.PathLike | None] = (),
    check: Callable[[Path], None] | None = None,
) -> Path:
    """Write text files into ``folder`` all-or-nothing; returns the folder.

    ``texts`` are ``(file name, text)`` pairs (plain names inside ``folder``,
    which is created if absent).  ``check``, if given, is called with the
    staging folder once every file is written there and before any is
    committed, so it can read the files back; an exception from it leaves the
    folder as it was.  The overwrite rule applies (``force``, ``inputs``); other
    files of the folder are never touched.  See :class:`OutputSet`.
    """
    with OutputSet(folder, force=force, inputs=inputs) as outputs:
        for name, text in texts:
            with outputs.open_text(name) as handle:
                handle.write(text)
        if check is not None:
            assert outputs.out_dir is not None
            check(outputs._stage_of(outputs.out_dir))
    return Path(folder)
