"""Where a record's bases come from: memory, a temporary spill file, or a FASTA file by range.

A :class:`SequenceSource` has a ``length`` (bases) and ``read(start0, end0)``, which
returns the raw bases ``[start0, end0)`` (0-based half-open) as they are in the file:
case kept, line ends and other whitespace removed.  ``close()`` gives back what the
source holds (an open file, a temporary file's disk space); it is safe to call twice
and waits for reads under way on other threads.  Reading a closed source raises
``ValueError``.

- :class:`BytesSource`: bases already in memory.
- :class:`SpillSource`: a temporary file the reader writes a long record into
  (:meth:`SpillSource.create`, :meth:`~SpillSource.append`, :meth:`~SpillSource.seal`)
  and then reads by range with ``os.pread``, so any number of threads may read at once.
  The file is created without a name in its folder (already unlinked, as
  :func:`tempfile.TemporaryFile` makes it), so nothing is left behind even when the
  process is killed; its space is given back when the source is closed or garbage
  collected.
- :class:`FileSliceSource`: one record of a plain-text FASTA file whose lines all hold
  the same number of bases (the rule of a ``.fai`` index: byte offset of the first base,
  bases per line, bytes per line with its end); reads only the bytes a range needs.
"""

from __future__ import annotations

import errno
import os
import tempfile
import threading
import weakref
from pathlib import Path
from typing import Protocol, runtime_checkable

import numpy as np

from seqstate.errors import SequenceFormatError, UsageError
from seqstate.io.atomic import write_failure

__all__ = [
    "FULL_DISK_ERRNOS",
    "BytesSource",
    "FileSliceSource",
    "SequenceSource",
    "SpillSource",
    "check_range",
]

#: errno values of a full disk, a quota or a file size limit while spilling.
FULL_DISK_ERRNOS = frozenset(
    e for e in (errno.ENOSPC, errno.EFBIG, getattr(errno, "EDQUOT", None)) if e is not None
)
_EOL = b"\r\n"
_LF = ord("\n")
_MAX_WRITE = 1 << 30  # bytes handed to one os.write call


@runtime_checkable
class SequenceSource(Protocol):
    """The bases of one record, read by range."""

    @property
    def length(self) -> int:
        """Number of bases."""
        ...

    def read(self, start0: int, end0: int) -> bytes:
        """Raw bases ``[start0, end0)``, 0-based half-open, ``0 <= start0 <= end0 <= length``."""
        ...

    def close(self) -> None:
        """Give back what the source holds; safe to call twice."""
        ...


def check_range(start0: int, end0: int, length: int) -> None:
    """Raise ``ValueError`` unless ``0 <= start0 <= end0 <= length`` (0-based half-open)."""
    if not 0 <= start0 <= end0 <= length:
        raise ValueError(
            f"range [{start0}, {end0}) is not within a sequence of {length} bases "
            "(expected 0 <= start0 <= end0 <= length)"
        )


class BytesSource:
    """Bases held in memory (``seq`` as raw ASCII bytes)."""

    def __init__(self, seq: bytes) -> None:
        self._seq: bytes | None = bytes(seq)
        self._length = len(seq)

    @property
    def length(self) -> int:
        """Number of bases."""
        return self._length

    def read(self, start0: int, end0: int) -> bytes:
        """Bases ``[start0, end0)`` (0-based half-open)."""
        check_range(start0, end0, self._length)
        seq = self._seq
        if seq is None:
            raise ValueError("the sequence source is closed")
        return seq[start0:end0]

    def close(self) -> None:
        """Drop the bytes (safe to call twice)."""
        self._seq = None


class _FdReader:
    """An open file descriptor shared by reading threads; close waits for reads under way."""

    def __init__(self, fd: int) -> None:
        self._fd = fd
        self._active = 0
        self._closed = False
        self._cond = threading.Condition()
        # Closes the descriptor if the owner is dropped without close().
        self._finalizer = weakref.finalize(self, os.close, fd)

    def pread(self, size: int, offset: int) -> bytes:
        with self._cond:
            if self._closed:
                raise ValueError("the sequence source is closed")
            self._active += 1
        try:
            parts = []
            while size > 0:
                part = os.pread(self._fd, size, offset)
                if not part:
                    break
                parts.append(part)
                size -= len(part)
                offset += len(part)
            return parts[0] if len(parts) == 1 else b"".join(parts)
        finally:
            with self._cond:
                self._active -= 1
                if self._active == 0:
                    self._cond.notify_all()

    @property
    def closed(self) -> bool:
        return self._closed

    def close(self) -> None:
        with self._cond:
            if self._closed:
                return
            self._closed = True
            while self._active:
                self._cond.wait()
        self._finalizer()


class SpillSource:
    """A record's bases in a temporary file: written once in order, then read by range.

    Make one with :meth:`create`, add the bases with :meth:`append`, then call
    :meth:`seal`; only a sealed source can be read.  ``close()`` deletes the
    temporary file (it has no name in its folder, so its space is given back at
    once); closing an unsealed source abandons it.  Safe to read from several
    threads at once.
    """

    def __init__(self, fd: int, folder: Path, what: str) -> None:
        self._reader = _FdReader(fd)
        self._fd = fd
        self._folder = folder
        self._what = what
        self._length = 0
        self._sealed = False

    @classmethod
    def create(cls, folder: str | os.PathLike[str] | None = None, what: str = "") -> SpillSource:
        """A new empty spill file in ``folder`` (default: :func:`tempfile.gettempdir`).

        ``what`` names the data in messages (for example ``record 'chr1' of x.fa``).
        A folder that cannot hold the file raises :class:`~seqstate.errors.UsageError`
        naming the folder and how to choose another (``TMPDIR``).
        """
        where = Path(folder) if folder is not None else Path(tempfile.gettempdir())
        try:
            handle = tempfile.TemporaryFile(dir=where, prefix="seqstate-spill-", buffering=0)
        except OSError as exc:
            raise _spill_error(exc, where, what) from None
        fd = os.dup(handle.fileno())
        handle.close()
        return cls(fd, where, what)

    @property
    def folder(self) -> Path:
        """The folder the temporary file lives in."""
        return self._folder

    @property
    def length(self) -> int:
        """Bases written so far (all of them once sealed)."""
        return self._length

    @property
    def closed(self) -> bool:
        """True once :meth:`close` ran (or a failed write closed it)."""
        return self._reader.closed

    def append(self, data: bytes) -> None:
        """Write ``data`` after the bases already written.

        A full disk, a quota or a file size limit closes the source (its space is
        given back) and raises :class:`~seqstate.errors.UsageError` naming the spill
        folder and ``TMPDIR``.
        """
        if self._sealed:
            raise ValueError("the spill file is sealed: no more bases can be added")
        if self._reader.closed:
            raise ValueError("the sequence source is closed")
        view = memoryview(data)
        offset = self._length
        try:
            while view:
                n = os.pwrite(self._fd, view[:_MAX_WRITE], offset)
                view = view[n:]
                offset += n
        except OSError as exc:
            self.close()
            raise _spill_error(exc, self._folder, self._what) from None
        self._length = offset

    def seal(self) -> SpillSource:
        """End writing; the source can now be read.  Returns itself."""
        self._sealed = True
        return self

    def read(self, start0: int, end0: int) -> bytes:
        """Bases ``[start0, end0)`` (0-based half-open), read with ``os.pread``."""
        if not self._sealed:
            raise ValueError("the spill file is still being written")
        check_range(start0, end0, self._length)
        data = self._reader.pread(end0 - start0, start0)
        if len(data) != end0 - start0:
            raise OSError(errno.EIO, f"the spill file in {self._folder} lost bases")
        return data

    def close(self) -> None:
        """Delete the temporary file (safe to call twice; waits for reads under way)."""
        self._reader.close()


def _spill_error(exc: OSError, folder: Path, what: str) -> UsageError:
    """The one-line error for a spill file that cannot be made or written in ``folder``."""
    hint = "set TMPDIR to a folder with more free space"
    subject = f"the temporary copy of {what}" if what else "a temporary copy of a record"
    subject += f" in spill folder '{folder}'"
    if exc.errno in FULL_DISK_ERRNOS:
        failure = write_failure(exc, subject)
        if failure is not None:
            return UsageError(f"{failure.message}; {hint}")
    reason = exc.strerror or str(exc)
    return UsageError(f"{subject} cannot be written: {reason}; set TMPDIR to a writable folder")


class FileSliceSource:
    """One record of a plain-text FASTA file with equal lines, read by range.

    ``offset`` is the byte offset of the record's first base, ``line_bases`` the
    bases on each full line and ``line_width`` the bytes of each full line with
    its end (``line_bases + 1`` for LF, ``+ 2`` for CRLF), ``length`` the bases of
    the record: the five numbers of a ``.fai`` line.  Only the bytes that hold
    the range are read.  A file that does not hold the bases where these numbers
    say (shorter, or other bytes than line ends between lines) raises
    :class:`~seqstate.errors.SequenceFormatError` naming the file.
    """

    def __init__(
        self,
        path: str | os.PathLike[str],
        offset: int,
        line_bases: int,
        line_width: int,
        length: int,
    ) -> None:
        if offset < 0 or length < 0 or line_bases < 1 or line_width < line_bases:
            raise ValueError(
                f"bad record layout: offset {offset}, {line_bases} bases in lines of "
                f"{line_width} bytes, length {length}"
            )
        self._path = str(path)
        self._offset = offset
        self._line_bases = line_bases
        self._line_width = line_width
        self._length = length
        try:
            fd = os.open(self._path, os.O_RDONLY)
        except OSError as exc:
            raise SequenceFormatError(
                f"cannot be read: {exc.strerror or exc}", path=self._path
            ) from None
        self._reader = _FdReader(fd)

    @property
    def length(self) -> int:
        """Number of bases."""
        return self._length

    def _byte_of(self, base0: int) -> int:
        line, column = divmod(base0, self._line_bases)
        return self._offset + line * self._line_width + column

    def read(self, start0: int, end0: int) -> bytes:
        """Bases ``[start0, end0)`` (0-based half-open), line ends removed."""
        check_range(start0, end0, self._length)
        if start0 == end0:
            return b""
        first = self._byte_of(start0)
        last = self._byte_of(end0 - 1)
        try:
            raw = self._reader.pread(last + 1 - first, first)
        except OSError as exc:
            raise SequenceFormatError(
                f"cannot be read: {exc.strerror or exc}", path=self._path
            ) from None
        data = raw.translate(None, _EOL) if self._line_width > self._line_bases else raw
        if (
            len(raw) != last + 1 - first
            or len(data) != end0 - start0
            or not self._ends_at(raw, first, start0, end0)
        ):
            raise SequenceFormatError(
                f"bases {start0 + 1}-{end0} are not where the index says (file shorter or "
                "lines of unequal length); rebuild the index",
                path=self._path,
            )
        return data

    def _ends_at(self, raw: bytes, first: int, start0: int, end0: int) -> bool:
        """True if every line inside ``raw`` ends (LF) exactly where the layout says."""
        if self._line_width == self._line_bases:
            return True
        lines = np.arange(start0 // self._line_bases, (end0 - 1) // self._line_bases)
        if lines.shape[0] == 0:
            return True
        at = self._offset - first + self._line_width - 1 + lines * self._line_width
        return bool(np.all(np.frombuffer(raw, dtype=np.uint8)[at] == _LF))

    def close(self) -> None:
        """Close the file (safe to call twice; waits for reads under way)."""
        self._reader.close()
