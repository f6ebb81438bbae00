"""Opening inputs: standard input or a file, plain or gzip; the lines of a handle.

One place for what every reader shares (FASTA, GFF3, BED, GTF, model tables and
manifest): inputs are plain text or gzip-compressed plain text, ASCII or UTF-8,
with LF or CRLF line ends.  A UTF-8 byte-order mark is accepted (and dropped);
other compressions and encodings are named in the error, so the user learns what
the file is instead of reading a parse error about its bytes.

The readers take an open binary handle (what :func:`open_input` yields, or any
``io.BytesIO``) and the name to use in messages; each has a thin wrapper that
takes a path.  :func:`peek_lines` reads the first lines of a handle for format
sniffing and gives back a handle that reads them again, so standard input is
read once.  Writing outputs all-or-nothing is :mod:`seqstate.io.atomic`.
"""

from __future__ import annotations

import gzip
import io
import os
import sys
import zlib
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any, BinaryIO

from seqstate.errors import SeqstateError, SequenceFormatError

__all__ = [
    "CR_ONLY",
    "MAGIC_BYTES",
    "STDIN_NAME",
    "UTF8_BOM",
    "display_name",
    "iter_lines",
    "open_input",
    "peek_lines",
    "read_error",
    "sniff",
    "text_lines",
    "unsupported_message",
]

#: The name standard input (``-``) goes by in messages.
STDIN_NAME = "<stdin>"

#: UTF-8 byte-order mark (EF BB BF), accepted at the start of any text input.
UTF8_BOM = b"\xef\xbb\xbf"

#: (leading bytes, what they mean), longest first where two could both match.
#: Compression magic numbers: gzip (RFC 1952, 1f 8b), bzip2 ("BZh"), xz (fd 37 7a 58
#: 5a 00), Zstandard (RFC 8878, 28 b5 2f fd), zip local file header ("PK\x03\x04");
#: byte-order marks of UTF-32 and UTF-16 (The Unicode Standard, section 23.8).
MAGIC_BYTES: tuple[tuple[bytes, str], ...] = (
    (b"\x1f\x8b", "gzip"),
    (b"BZh", "bzip2"),
    (b"\xfd7zXZ\x00", "xz"),
    (b"\x28\xb5\x2f\xfd", "zstd"),
    (b"PK\x03\x04", "zip"),
    (b"\xff\xfe\x00\x00", "UTF-32"),
    (b"\x00\x00\xfe\xff", "UTF-32"),
    (b"\xff\xfe", "UTF-16"),
    (b"\xfe\xff", "UTF-16"),
)

#: How many leading bytes :func:`sniff` needs to tell every case apart.
SNIFF_BYTES = 6

#: The words used for a file with carriage returns that end no line feed.
CR_ONLY = (
    "has carriage returns (CR) without line feeds: CR-only line endings (classic Mac OS); "
    "expected LF or CRLF line endings"
)


def sniff(head: bytes) -> str | None:
    """What the first bytes ``head`` show: ``gzip``, ``bzip2``, ``xz``, ``zstd``, ``zip``,
    ``UTF-16``, ``UTF-32``, or None for anything else (plain text, possibly with a
    UTF-8 byte-order mark)."""
    for magic, kind in MAGIC_BYTES:
        if head.startswith(magic):
            return kind
    return None


def unsupported_message(kind: str, *, inside_gzip: bool = False) -> str:
    """The error text for an input that :func:`sniff` found to be ``kind`` (not gzip)."""
    if kind in ("UTF-16", "UTF-32"):
        return (
            f"is {kind} text (it starts with a {kind} byte-order mark); "
            "expected ASCII or UTF-8 text"
        )
    if inside_gzip:
        if kind == "gzip":
            return "compressed twice with gzip (gzip inside gzip); only plain and gzip are read"
        return f"compressed with {kind} inside gzip; only plain and gzip are read"
    if kind == "zip":
        return "is a zip archive; only plain and gzip are read"
    return f"compressed with {kind}; only plain and gzip are read"


# ---------------------------------------------------------------- opening


def display_name(path: str | os.PathLike[str]) -> str:
    """The name used for ``path`` in messages: ``<stdin>`` for ``"-"``."""
    return STDIN_NAME if str(path) == "-" else str(path)


class _PrefixedReader(io.RawIOBase):
    """A raw reader that returns ``prefix`` and then the rest of ``inner``."""

    def __init__(self, prefix: bytes, inner: BinaryIO) -> None:
        super().__init__()
        self._prefix = prefix
        self._inner = inner

    def readable(self) -> bool:
        return True

    def readinto(self, buffer: Any) -> int:
        view = memoryview(buffer).cast("B")
        if self._prefix:
            n = min(len(view), len(self._prefix))
            view[:n] = self._prefix[:n]
            self._prefix = self._prefix[n:]
            return n
        read1 = getattr(self._inner, "read1", None)
        data = read1(len(view)) if read1 is not None else self._inner.read(len(view))
        n = len(data)
        view[:n] = data
        return n


def _read_head(stream: BinaryIO, n: int) -> bytes:
    """Up to ``n`` first bytes of ``stream`` (fewer only at the end of the data)."""
    head = b""
    while len(head) < n:
        chunk = stream.read(n - len(head))
        if not chunk:
            break
        head += chunk
    return head


@contextmanager
def open_input(
    path: str | os.PathLike[str],
    error_cls: type[SeqstateError] = SequenceFormatError,
    what: str = "FASTA",
) -> Iterator[BinaryIO]:
    """Open an input file for reading bytes, decompressing gzip transparently.

    ``path`` is a file name or ``"-"`` for standard input.  Gzip is recognised
    by its first two bytes (1f 8b), whatever the file name.  A UTF-8 byte-order
    mark at the start of the (decompressed) text is dropped.  A missing or
    unreadable file, another compression (bzip2, xz, zstd, zip, gzip inside
    gzip) or a UTF-16/UTF-32 text raises ``error_cls`` naming the file and what
    was found (:mod:`seqstate.io.files`); ``what`` names the expected format in
    the message.  Shared by every reader.
    """
    shown = display_name(path)
    if str(path) == "-":
        inner: BinaryIO = sys.stdin.buffer
        close_inner = False
    else:
        try:
            inner = open(path, "rb")
        except FileNotFoundError:
            raise error_cls("file not found", path=shown) from None
        except IsADirectoryError:
            raise error_cls(f"is a directory, expected a {what} file", path=shown) from None
        except OSError as exc:
            raise error_cls(f"cannot be read: {exc.strerror or exc}", path=shown) from None
        close_inner = True
    try:
        try:
            magic = _read_head(inner, SNIFF_BYTES)
        except OSError as exc:
            raise error_cls(f"cannot be read: {exc.strerror or exc}", path=shown) from None
        kind = sniff(magic)
        if kind is not None and kind != "gzip":
            raise error_cls(unsupported_message(kind), path=shown)
        if kind is None and magic.startswith(UTF8_BOM):
            magic = magic[len(UTF8_BOM) :]
        base: BinaryIO = io.BufferedReader(_PrefixedReader(magic, inner))
        if kind == "gzip":
            handle: BinaryIO = gzip.GzipFile(fileobj=base, mode="rb")  # type: ignore[assignment]
        else:
            handle = base
        try:
            if kind == "gzip":
                _check_inside_gzip(handle, shown, error_cls)
            yield handle
        finally:
            handle.close()
            base.close()
    finally:
        if close_inner:
            inner.close()


#: What reading a handle raises for a failing disk or a corrupt gzip stream.
READ_ERRORS = (OSError, EOFError, zlib.error)


def read_error(
    exc: BaseException,
    shown: str,
    error_cls: type[SeqstateError],
    line0: int | None = None,
) -> SeqstateError:
    """The error for a read that failed with ``exc`` (one of :data:`READ_ERRORS`)."""
    reason = getattr(exc, "strerror", None) or str(exc) or type(exc).__name__
    return error_cls(
        f"cannot be read (corrupt or truncated file?): {reason}", path=shown, line0=line0
    )


def _check_inside_gzip(handle: BinaryIO, shown: str, error_cls: type[SeqstateError]) -> None:
    """Refuse a second compression inside gzip; drop a UTF-8 byte-order mark there."""
    try:
        head = handle.peek(SNIFF_BYTES)[:SNIFF_BYTES]  # type: ignore[attr-defined]
    except READ_ERRORS as exc:
        raise read_error(exc, shown, error_cls) from None
    kind = sniff(head)
    if kind is not None:
        raise error_cls(unsupported_message(kind, inside_gzip=True), path=shown)
    if head.startswith(UTF8_BOM):
        handle.read(len(UTF8_BOM))


def iter_lines(
    handle: BinaryIO, shown: str, error_cls: type[SeqstateError]
) -> Iterator[tuple[int, bytes]]:
    """Yield ``(line0, line)`` pairs (0-based line index, raw bytes with EOL).

    A read failure (for example a truncated or corrupt gzip stream) raises
    ``error_cls`` naming the file and the line reached.
    """
    line0 = -1
    iterator = iter(handle)
    while True:
        try:
            line = next(iterator)
        except StopIteration:
            return
        except READ_ERRORS as exc:
            raise read_error(exc, shown, error_cls, line0 + 1) from None
        line0 += 1
        yield line0, line


def text_lines(
    handle: BinaryIO, shown: str, error_cls: type[SeqstateError]
) -> Iterator[tuple[int, str]]:
    """Yield ``(line0, text)``: each line decoded as UTF-8, its LF or CRLF end removed.

    A line that is not UTF-8 or holds a carriage return that ends no line feed
    (CR-only line ends) raises ``error_cls`` naming the file and line; so does a
    read failure (see :func:`iter_lines`).
    """
    for line0, raw in iter_lines(handle, shown, error_cls):
        try:
            line = raw.decode("utf-8")
        except UnicodeDecodeError:
            raise error_cls("line is not valid UTF-8 text", path=shown, line0=line0) from None
        line = line.rstrip("\r\n")
        if "\r" in line:
            raise error_cls(CR_ONLY, path=shown, line0=line0)
        yield line0, line


def peek_lines(
    handle: BinaryIO,
    shown: str,
    error_cls: type[SeqstateError],
    *,
    most: int,
    until_data: bool = True,
) -> tuple[list[bytes], BinaryIO]:
    """The first lines of ``handle`` (raw bytes with their ends) and a handle that
    reads the whole input again from its first byte.

    Reading stops after ``most`` lines or, with ``until_data``, after the first
    line that is neither blank nor a ``#`` comment.  The returned handle serves
    the lines read from memory and then the rest of ``handle``, so a format can
    be sniffed on standard input without reading it twice.
    """
    head: list[bytes] = []
    for line0, raw in iter_lines(handle, shown, error_cls):
        head.append(raw)
        stripped = raw.strip()
        if line0 + 1 >= most or (until_data and stripped and not stripped.startswith(b"#")):
            break
    replay: BinaryIO = io.BufferedReader(_PrefixedReader(b"".join(head), handle))
    return head, replay
