"""All-or-nothing output: a run's files appear only if the whole run succeeds.

Each output is written under a hidden temporary name in the output directory
(``.NAME.tmp-PID``) and renamed to ``NAME`` with :func:`os.replace` when the
``with`` block ends without an exception.  Each rename is atomic on its own;
the set is renamed only after every file has been closed successfully.  On any
exception, ``KeyboardInterrupt`` included, the temporary files are deleted and
directories this object created are removed again if they are empty.
"""

from __future__ import annotations

import os
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from types import TracebackType
from typing import TextIO

from seqstate.errors import UsageError

__all__ = ["OutputSet", "atomic_text"]


class OutputSet:
    """Context manager for the files one run writes into ``out_dir``.

    ``out_dir`` is created (with its parents) on entering if absent.  Use
    :meth:`open_text` for text outputs and :meth:`path` for outputs written by
    another library (bigWig); both take the final file name, which must be a
    plain name without a directory part.
    """

    def __init__(self, out_dir: str | Path) -> None:
        self.out_dir = Path(out_dir)
        self._created: list[Path] = []
        self._temps: dict[str, Path] = {}
        self._handles: list[TextIO] = []
        self._entered = False

    # ------------------------------------------------------------ helpers

    def _fail(self, reason: object) -> UsageError:
        return UsageError(f"output directory '{self.out_dir}' cannot be written: {reason}")

    @staticmethod
    def _reason(exc: OSError) -> str:
        return exc.strerror or str(exc)

    def _register(self, name: str) -> Path:
        if not self._entered:
            raise RuntimeError("OutputSet must be used as a context manager ('with')")
        if not name or name in (".", "..") or "/" in name or os.sep in name:
            raise ValueError(f"output name {name!r} must be a plain file name")
        if name in self._temps:
            raise ValueError(f"output {name!r} was already opened in this output set")
        temp = self.out_dir / f".{name}.tmp-{os.getpid()}"
        self._temps[name] = temp
        return temp

    # ------------------------------------------------------------ public API

    def final_path(self, name: str) -> Path:
        """Where ``name`` will be once the run has succeeded."""
        return self.out_dir / name

    def open_text(self, name: str) -> TextIO:
        """Open a UTF-8 text output (``\\n`` line ends) under its temporary name."""
        temp = self._register(name)
        try:
            handle = open(temp, "w", encoding="utf-8", newline="\n")
        except OSError as exc:
            del self._temps[name]
            raise self._fail(self._reason(exc)) from None
        self._handles.append(handle)
        return handle

    def path(self, name: str) -> Path:
        """A temporary path for a binary writer; renamed to ``name`` on success.

        The caller must create the file there before the ``with`` block ends.
        """
        return self._register(name)

    def __enter__(self) -> OutputSet:
        missing: list[Path] = []
        probe = self.out_dir
        while not probe.exists() and not probe.is_symlink():
            missing.append(probe)
            if probe.parent == probe:
                break
            probe = probe.parent
        try:
            self.out_dir.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            self._created = [p for p in missing if p.is_dir()]
            self._remove_created()
            raise self._fail(self._reason(exc)) from None
        self._created = missing  # deepest first
        if not self.out_dir.is_dir():
            raise self._fail("it exists and is not a directory")
        if not os.access(self.out_dir, os.W_OK | os.X_OK):
            self._remove_created()
            raise self._fail("permission denied")
        self._entered = True
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> bool:
        self._entered = False
        if exc_type is not None:
            self._discard()
            return False
        try:
            for handle in self._handles:
                handle.close()
        except OSError as error:
            self._discard()
            raise self._fail(self._reason(error)) from None
        missing = [name for name, temp in self._temps.items() if not temp.exists()]
        if missing:
            self._discard()
            raise RuntimeError(f"outputs {missing} were never written to their temporary paths")
        try:
            for name, temp in self._temps.items():
                os.replace(temp, self.out_dir / name)
        except OSError as error:
            self._discard()
            raise self._fail(self._reason(error)) from None
        self._temps.clear()
        self._handles.clear()
        return False

    # ------------------------------------------------------------ cleanup

    def _discard(self) -> None:
        for handle in self._handles:
            try:
                handle.close()
            except OSError:
                pass
        for temp in self._temps.values():
            try:
                temp.unlink(missing_ok=True)
            except OSError:
                pass
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
def atomic_text(path: str | Path) -> Iterator[TextIO]:
    """Write one text file all-or-nothing: ``with atomic_text("out.fa") as handle:``.

    The file is written under a temporary name beside ``path`` (its directory
    is created if absent) and renamed to ``path`` only if the block succeeds;
    see :class:`OutputSet` for the rules and errors.
    """
    target = Path(path)
    if not target.name or target.name in (".", ".."):
        raise UsageError(f"output file '{path}' is not a file name")
    if target.is_dir():
        raise UsageError(f"output file '{path}' is a directory, expected a file name")
    with OutputSet(target.parent) as outputs:
        yield outputs.open_text(target.name)
