"""The index files of an indexed FASTA: the ``.fai`` table and the ``.gzi`` block list of
bgzip files (parse, format, where they are), and what kind of file a FASTA is.

Formats: see :mod:`seqstate.io.faidx`.  Offsets are 0-based byte offsets; line numbers in
messages are 1-based.
"""

from __future__ import annotations

import bisect
import os
import struct
import zlib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from Bio import bgzf

from seqstate.errors import SeqstateError, SequenceFormatError
from seqstate.io import files

#: gzip magic, deflate, FEXTRA set: how a BGZF block starts (SAM/BAM format
#: specification, section 4.1, "The BGZF compression format").
_BGZF_MAGIC = b"\x1f\x8b\x08\x04"
_BLOCK_MAX = 1 << 16
#: What decompressing one bgzip block raises for corrupt data: Bio.bgzf's RuntimeError
#: (a CRC or size that does not match), zlib's error (bad deflate data), OSError (the disk).
_BLOCK_ERRORS = (RuntimeError, zlib.error, OSError)


def fai_path(path: str | os.PathLike[str]) -> Path:
    """The ``.fai`` index of a FASTA file: its name with ``.fai`` added."""
    return Path(f"{os.fspath(path)}.fai")


def gzi_path(path: str | os.PathLike[str]) -> Path:
    """The ``.gzi`` index of a bgzip FASTA file: its name with ``.gzi`` added."""
    return Path(f"{os.fspath(path)}.gzi")


def _rebuild_hint(path: str | os.PathLike[str]) -> str:
    return f"rebuild it with: seqstate index --force {os.fspath(path)}"


# ---------------------------------------------------------------- the index files


@dataclass(frozen=True)
class FaiEntry:
    """One line of a ``.fai`` index.

    ``offset`` is the 0-based byte offset of the first base in the uncompressed
    text; ``line_bases`` the bases and ``line_width`` the bytes (line end
    included) of every full line of the record.
    """

    name: str
    length: int
    offset: int
    line_bases: int
    line_width: int

    def byte_of(self, pos0: int) -> int:
        """The byte offset of the base at 0-based record position ``pos0``."""
        if self.line_bases <= 0:
            return self.offset
        return self.offset + (pos0 // self.line_bases) * self.line_width + pos0 % self.line_bases


def parse_fai(text: str, shown: str) -> list[FaiEntry]:
    """The entries of a ``.fai`` text, named ``shown`` in messages.

    Raises :class:`~seqstate.errors.SequenceFormatError` naming the line for a
    line without five tab-separated fields, a number that is not a whole number
    of the right range, a line width smaller than its bases (or, for a record
    of more than one line, not larger), or a repeated name.
    """
    entries: list[FaiEntry] = []
    seen: dict[str, int] = {}
    lines = text.split("\n")
    for line0, line in enumerate(lines):
        line = line.rstrip("\r")
        if not line:
            if line0 == len(lines) - 1:
                continue
            raise SequenceFormatError(
                "empty line; expected name, length, offset, line bases, line width "
                "separated by tabs",
                path=shown,
                line0=line0,
            )
        fields = line.split("\t")
        if len(fields) < 5:
            raise SequenceFormatError(
                f"{len(fields)} tab-separated field(s); expected 5 (name, length, offset, "
                "line bases, line width)",
                path=shown,
                line0=line0,
            )
        name = fields[0]
        numbers = []
        for label, cell in zip(("length", "offset", "line bases", "line width"), fields[1:5]):
            if not cell.isdigit() or not cell.isascii():
                raise SequenceFormatError(
                    f"{label} {cell!r} is not a whole number (expected digits 0-9)",
                    path=shown,
                    line0=line0,
                    where=f"record '{name}'",
                )
            numbers.append(int(cell))
        length, offset, bases, width = numbers
        if not name:
            raise SequenceFormatError("empty record name", path=shown, line0=line0)
        if length > 0 and (bases < 1 or width <= bases and length > bases or width < bases):
            raise SequenceFormatError(
                f"line bases {bases} and line width {width} do not fit a record of length "
                f"{length} (expected 1 <= line bases < line width)",
                path=shown,
                line0=line0,
                where=f"record '{name}'",
            )
        if name in seen:
            raise SequenceFormatError(
                f"record '{name}' is listed twice (first on line {seen[name] + 1})",
                path=shown,
                line0=line0,
            )
        seen[name] = line0
        entries.append(FaiEntry(name, length, offset, bases, width))
    return entries


def format_fai(entries: list[FaiEntry]) -> str:
    """The ``.fai`` text of ``entries``: five tab-separated fields a line, LF ends."""
    return "".join(
        f"{e.name}\t{e.length}\t{e.offset}\t{e.line_bases}\t{e.line_width}\n" for e in entries
    )


def parse_gzi(data: bytes, shown: str) -> list[tuple[int, int]]:
    """The (compressed offset, uncompressed offset) pairs of a ``.gzi`` file.

    Raises :class:`~seqstate.errors.SequenceFormatError` when the size does not
    match the count or the offsets do not increase.
    """
    if len(data) < 8:
        raise SequenceFormatError(
            f"is {len(data)} bytes; expected at least 8 (a little-endian uint64 block count)",
            path=shown,
        )
    (count,) = struct.unpack_from("<Q", data, 0)
    if len(data) != 8 + 16 * count:
        raise SequenceFormatError(
            f"is {len(data)} bytes for {count} block(s); expected {8 + 16 * count} "
            "(count, then 16 bytes per block)",
            path=shown,
        )
    values = np.frombuffer(data, dtype="<u8", offset=8).reshape(count, 2)
    pairs = [(int(c), int(u)) for c, u in values]
    for i in range(1, len(pairs)):
        if pairs[i][0] <= pairs[i - 1][0] or pairs[i][1] < pairs[i - 1][1]:
            raise SequenceFormatError(
                f"block {i + 1} starts at {pairs[i]} before block {i} at {pairs[i - 1]}; "
                "expected increasing offsets",
                path=shown,
            )
    return pairs


def format_gzi(pairs: list[tuple[int, int]]) -> bytes:
    """The ``.gzi`` bytes of (compressed offset, uncompressed offset) pairs."""
    out = bytearray(struct.pack("<Q", len(pairs)))
    for coff, uoff in pairs:
        out += struct.pack("<QQ", coff, uoff)
    return bytes(out)


# ---------------------------------------------------------------- what a file is


def compression_of(path: str | os.PathLike[str]) -> str:
    """``"stdin"``, ``"plain"``, ``"bgzip"``, ``"gzip"`` or ``"other"`` (another
    compression, a missing or unreadable file: the stream reader names it)."""
    if os.fspath(path) == "-":
        return "stdin"
    try:
        with open(path, "rb") as handle:
            head = handle.read(18)
    except OSError:
        return "other"
    kind = files.sniff(head)
    if kind is None:
        return "plain"
    if kind != "gzip":
        return "other"
    # BGZF: FEXTRA with a 'BC' subfield of length 2 right after the 12-byte header
    if head.startswith(_BGZF_MAGIC) and head[12:14] == b"BC" and head[14:16] == b"\x02\x00":
        return "bgzip"
    return "gzip"


# ---------------------------------------------------------------- the index in memory
@dataclass
class FastaIndex:
    """A FASTA file's index: its records (in file order) and, for bgzip, its blocks."""

    path: Path
    kind: str  # "plain" or "bgzip"
    entries: dict[str, FaiEntry]
    gzi: list[tuple[int, int]] | None = None
    checked: set[str] = field(default_factory=set)  # records whose bytes were checked
    _size: int | None = None
    _starts: list[int] | None = None

    # ------------------------------------------------------------ bytes
    def _virtual(self, u: int) -> int:
        assert self.gzi is not None
        if self._starts is None:
            self._starts = [0] + [uo for _, uo in self.gzi]
        starts = self._starts
        k = bisect.bisect_right(starts, u) - 1
        coff = 0 if k == 0 else self.gzi[k - 1][0]
        within = u - starts[k]
        if within >= _BLOCK_MAX:
            raise _Stale(f"offset {u} lies past the blocks the .gzi index lists")
        return (coff << 16) | within

    def read(self, start: int, end: int) -> bytes:
        """Bytes ``[start, end)`` of the uncompressed text (fewer at its end)."""
        if end <= start:
            return b""
        if self.kind == "plain":
            try:
                with open(self.path, "rb") as handle:
                    return os.pread(handle.fileno(), end - start, start)
            except OSError as exc:
                raise SequenceFormatError(
                    f"cannot be read: {exc.strerror or exc}", path=str(self.path)
                ) from None
        try:
            with open(self.path, "rb") as raw, bgzf.BgzfReader(fileobj=raw, mode="rb") as reader:
                reader.seek(self._virtual(start))
                data = reader.read(end - start)
        except (ValueError, EOFError) as exc:  # a block the .gzi misplaces
            raise _Stale(f"the .gzi index does not match the blocks ({exc})") from None
        except _BLOCK_ERRORS as exc:
            raise self._corrupt(exc) from None
        return data if isinstance(data, bytes) else data.encode("latin-1")

    def _corrupt(self, exc: BaseException) -> SeqstateError:
        """The error for a bgzip block that does not decompress (a bad CRC or size, bad
        deflate data, a failing disk): the words of the stream reader for the same file."""
        return files.read_error(exc, files.display_name(self.path), SequenceFormatError)

    def size(self) -> int:
        """Bytes of the uncompressed text."""
        if self._size is None:
            if self.kind == "plain":
                self._size = os.path.getsize(self.path)
            else:
                assert self.gzi is not None
                last = self.gzi[-1] if self.gzi else (0, 0)
                n = 0
                try:
                    # the handle is ours: closed even when the reader fails on its first block
                    with (
                        open(self.path, "rb") as raw,
                        bgzf.BgzfReader(fileobj=raw, mode="rb") as reader,
                    ):
                        reader.seek(last[0] << 16)
                        while piece := reader.read(1 << 20):
                            n += len(piece)
                except (ValueError, EOFError) as exc:
                    raise _Stale(f"the .gzi index does not match the blocks ({exc})") from None
                except _BLOCK_ERRORS as exc:
                    raise self._corrupt(exc) from None
                self._size = last[1] + n
        return self._size


class _Stale(Exception):
    """The index does not describe the bytes of its FASTA."""
