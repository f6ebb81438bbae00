"""Safe outputs: all-or-nothing output sets, applying the overwrite rule.

The overwrite rule itself (:func:`check_outputs`) is in :mod:`seqstate.io.overwrite`;
stop signals, hold points, locks and recovery in :mod:`seqstate.io.staging`.  Both are
re-exported here, the one import path for commands.

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
import json
import os
import re
import shutil
from collections.abc import Callable, Iterable, Iterator
from contextlib import contextmanager
from pathlib import Path
from types import TracebackType
from typing import Literal, TextIO

from seqstate.errors import UsageError
from seqstate.io.overwrite import WRITE_ERRNOS, _usable, check_outputs, same_file, write_failure
from seqstate.io.staging import (
    JOURNAL,
    STAGE_PREFIX,
    _locked,
    held_signals,
    hold_point,
    note_stop,
    recover_folder,
    stop_requested,
)

__all__ = [
    "STAGE_PREFIX",
    "WRITE_ERRNOS",
    "OutputSet",
    "atomic_folder",
    "atomic_text",
    "check_outputs",
    "held_signals",
    "hold_point",
    "note_stop",
    "recover_folder",
    "same_file",
    "stop_requested",
    "write_failure",
]

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
