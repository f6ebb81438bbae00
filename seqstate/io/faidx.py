"""Indexed FASTA: the ``.fai`` index, the ``.gzi`` index of bgzip files, region reads.

The ``.fai`` index is the tab-separated table genome tools share, one line per
record: name, length (bases), offset (0-based byte offset of the record's first
base in the uncompressed text), line bases (bases on each full line) and line
width (bytes of each full line, line end included).  Every line of a record but
its last must hold the same number of bases and bytes; a record laid out any
other way cannot be indexed.

A bgzip file (gzip made of independent blocks of at most 64 KiB, each carrying
its compressed size in a ``BC`` extra field) is read through its ``.gzi`` index:
a little-endian unsigned 64-bit count, then that many (compressed offset,
uncompressed offset) pairs of little-endian unsigned 64-bit integers, one per
block after the first.  The blocks and their virtual offsets (compressed
offset << 16 | offset inside the block) are Biopython's :mod:`Bio.bgzf`; the
``.fai`` and ``.gzi`` files are read and written here.  Plain gzip has no
random access: :func:`region_record` returns None and the caller streams.

The index of ``x.fa`` is ``x.fa.fai`` (and ``x.fa.gzi``), next to it.  It is built
by :func:`build_index` (``seqstate index``) or on first use by
:func:`region_record` / :func:`record_lengths` for a file of at least
:data:`AUTO_INDEX_BYTES` bytes: next to the file when its folder is writable,
else kept in memory for the run (with one ``note:`` line).  Smaller files are
streamed, which is as fast.  An index is checked before each use: older than
its FASTA, not matching the bytes at a record's offset, or naming bases past the
end of the file is an error that says how to rebuild it.

Coordinates: a :class:`~seqstate.io.regions.Region` is 0-based half-open;
offsets are 0-based byte offsets; line numbers in messages are 1-based.
"""

from __future__ import annotations

import bisect
import gzip
import os
import struct
import zlib
from dataclasses import dataclass, field
from pathlib import Path
from typing import BinaryIO

import numpy as np
from Bio import bgzf

from seqstate import log
from seqstate.errors import SeqstateError, SequenceFormatError, UsageError
from seqstate.io import files
from seqstate.io.atomic import OutputSet
from seqstate.io.fasta import DNA_ALPHABET, Record, iter_fasta
from seqstate.io.regions import TO_END, Region, check_region

__all__ = [
    "AUTO_INDEX_BYTES",
    "FaiEntry",
    "FastaIndex",
    "IndexedSource",
    "build_index",
    "clear_memory",
    "compression_of",
    "fai_path",
    "format_fai",
    "format_gzi",
    "gzi_path",
    "load_index",
    "parse_fai",
    "parse_gzi",
    "record_lengths",
    "record_source",
    "region_record",
    "scan_fasta",
]

#: Files smaller than this (bytes on disk) are not indexed on first use: they are
#: streamed whole, which costs no more than building an index.  An index that
#: exists is used whatever the size.
AUTO_INDEX_BYTES = 16 << 20

#: Bytes read per step while building an index.
_CHUNK = 8 << 20

_DNA_BYTES = (DNA_ALPHABET + DNA_ALPHABET.lower()).encode("ascii")
_WHITESPACE = b" \t\r\n\v\f"
_INNER_SPACE = b" \t\v\f"
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


# ---------------------------------------------------------------- building


class _Unreadable(Exception):
    """Raised inside the scan: the stream reader is asked for the exact error."""


class _NotIndexable(Exception):
    """A valid FASTA whose layout a ``.fai`` cannot describe."""


@dataclass
class _Open:
    """The record being scanned."""

    name: str
    line0: int
    offset: int
    length: int = 0
    bases: int = 0
    width: int = 0
    ended: bool = False  # a short or blank line was seen: only blank lines may follow


def scan_fasta(
    handle: BinaryIO,
    shown: str,
    *,
    alphabet_check: str | None = "dna",
    empty_records: str = "error",
) -> list[FaiEntry]:
    """The ``.fai`` entries of the uncompressed FASTA text read from ``handle``.

    Reads in blocks of a few MiB (memory bounded at any record length).  Raises
    :class:`_NotIndexable` for lines of unequal length inside a record, and
    :class:`_Unreadable` for anything the stream reader refuses (the caller asks
    :func:`~seqstate.io.fasta.iter_fasta` for its message).
    """
    entries: list[FaiEntry] = []
    seen: set[str] = set()
    rec: _Open | None = None
    pos = 0  # byte offset of ``data``'s first byte
    line0 = 0
    carry = b""
    first = True
    while True:
        try:
            chunk = handle.read(_CHUNK)
        except files.READ_ERRORS:
            raise _Unreadable from None
        if first:
            first = False
            if chunk.startswith(files.UTF8_BOM):
                chunk = chunk[len(files.UTF8_BOM) :]
                pos = len(files.UTF8_BOM)
        data = carry + chunk
        if chunk:
            cut = data.rfind(b"\n") + 1
            if cut == 0:
                carry = data
                continue
            carry = data[cut:]
            data = data[:cut]
        else:
            carry = b""
        rec, line0 = _scan_lines(
            data, pos, line0, rec, entries, seen, alphabet_check, empty_records
        )
        pos += len(data)
        if not chunk:
            break
    if rec is not None:
        _close(rec, entries, empty_records)
    if not entries or all(e.length == 0 for e in entries):
        raise _Unreadable
    return entries


def _close(rec: _Open, entries: list[FaiEntry], empty_records: str) -> None:
    if rec.length == 0 and empty_records == "error":
        raise _Unreadable
    width = rec.width if rec.length else 0
    entries.append(FaiEntry(rec.name, rec.length, rec.offset, rec.bases, width))


def _scan_lines(
    data: bytes,
    pos: int,
    line0: int,
    rec: _Open | None,
    entries: list[FaiEntry],
    seen: set[str],
    alphabet_check: str | None,
    empty_records: str,
) -> tuple[_Open | None, int]:
    """Scan whole lines ``data`` (starting at byte ``pos``, line ``line0``)."""
    starts = [0] if data[:1] == b">" else []
    h = data.find(b"\n>")
    while h >= 0:
        starts.append(h + 1)
        h = data.find(b"\n>", h + 1)
    edges = [*starts, len(data)]
    # the sequence lines before the first header of this block
    head_end = starts[0] if starts else len(data)
    _scan_sequence(data[:head_end], rec, alphabet_check)
    line0 += data.count(b"\n", 0, head_end)
    for k, s in enumerate(starts):
        nl = data.find(b"\n", s)
        header_end = len(data) if nl < 0 else nl + 1
        if rec is not None:
            _close(rec, entries, empty_records)
        title = data[s + 1 : header_end]
        try:
            words = title.decode("utf-8").split(None, 1)
        except UnicodeDecodeError:
            raise _Unreadable from None
        if not words or words[0] in seen or b"\r" in title.rstrip(b"\r\n") or b"\0" in title:
            raise _Unreadable
        seen.add(words[0])
        rec = _Open(words[0], line0, pos + header_end)
        line0 += 1
        block = data[header_end : edges[k + 1]]
        _scan_sequence(block, rec, alphabet_check)
        line0 += block.count(b"\n")
    return rec, line0


def _scan_sequence(block: bytes, rec: _Open | None, alphabet_check: str | None) -> None:
    """Add the whole sequence lines ``block`` to ``rec`` (None: before the first header)."""
    if not block:
        return
    if rec is None:
        if block.strip(_WHITESPACE) or block.count(b"\r") != block.count(b"\r\n"):
            raise _Unreadable  # text before the first header, CR-only line ends
        return
    if alphabet_check == "dna" and block.translate(None, _WHITESPACE + _DNA_BYTES):
        raise _Unreadable
    if block.count(b"\r") != block.count(b"\r\n"):
        raise _Unreadable  # CR-only line ends
    arr = np.frombuffer(block, dtype=np.uint8)
    ends = np.flatnonzero(arr == 10)
    if not block.endswith(b"\n"):
        ends = np.append(ends, len(block))
    begins = np.concatenate(([0], ends[:-1] + 1))
    widths = ends - begins + 1  # line end included
    cr = np.zeros(len(ends), dtype=bool)
    has = ends > begins
    cr[has] = arr[ends[has] - 1] == 13
    bases = widths - 1 - cr  # a last line without its line end counts as if it had one
    if any(ch in block for ch in _INNER_SPACE):
        raise _NotIndexable(f"record '{rec.name}' has spaces or tabs inside a sequence line")
    if rec.bases == 0 and not rec.ended:
        data_lines = np.flatnonzero(bases > 0)
        if len(data_lines) == 0:
            rec.ended = True  # blank lines only so far
            return
        if data_lines[0] > 0:
            raise _NotIndexable(f"record '{rec.name}' has a blank line before its bases")
        rec.bases = int(bases[0])
        rec.width = int(widths[0])
    unequal = _NotIndexable(
        f"record '{rec.name}' has lines of unequal length (every line but the last must "
        f"hold {rec.bases} bases in {rec.width} bytes)"
    )
    if rec.ended:
        if np.any(bases > 0):
            raise unequal
        return
    full = (bases == rec.bases) & (widths == rec.width)
    bad = np.flatnonzero(~full)
    if len(bad):
        b = int(bad[0])
        if bases[b] > rec.bases or np.any(bases[b + 1 :] > 0):
            raise unequal
        rec.ended = True
    rec.length += int(bases.sum())


def _scan_file(
    path: str | os.PathLike[str], kind: str, alphabet_check: str | None, empty_records: str
) -> list[FaiEntry]:
    """Scan a plain or bgzip FASTA file; errors as :func:`iter_fasta` (same words)."""
    shown = files.display_name(path)
    try:
        with open(path, "rb") as raw:
            handle: BinaryIO = raw
            if kind == "bgzip":
                handle = gzip.GzipFile(fileobj=raw, mode="rb")  # type: ignore[assignment]
            return scan_fasta(
                handle, shown, alphabet_check=alphabet_check, empty_records=empty_records
            )
    except _Unreadable:
        pass
    except _NotIndexable as exc:
        _reader_error(path, alphabet_check, empty_records)
        raise SequenceFormatError(
            f"cannot be indexed: {exc}; rewrite it with equal lines (seqstate writes 60 bases "
            "a line)",
            path=shown,
        ) from None
    except OSError as exc:
        raise SequenceFormatError(f"cannot be read: {exc.strerror or exc}", path=shown) from None
    _reader_error(path, alphabet_check, empty_records)
    raise SequenceFormatError("cannot be indexed: not a FASTA file it can read", path=shown)


def _reader_error(path: str | os.PathLike[str], alphabet_check: str | None, empty: str) -> None:
    """Raise the error the stream reader gives for ``path``, if any."""
    for _ in iter_fasta(os.fspath(path), alphabet_check=alphabet_check, empty_records=empty):
        pass


def _scan_blocks(path: str | os.PathLike[str]) -> list[tuple[int, int]]:
    """The ``.gzi`` pairs of a bgzip file: one per non-empty block after the first."""
    shown = files.display_name(path)
    pairs: list[tuple[int, int]] = []
    try:
        with open(path, "rb") as handle:
            for start, _raw, data_start, data_len in bgzf.BgzfBlocks(handle):
                if start > 0 and data_len > 0:
                    pairs.append((start, data_start))
    except (ValueError, OSError, EOFError) as exc:
        raise SequenceFormatError(
            f"is not a readable bgzip file (corrupt or truncated?): {exc}", path=shown
        ) from None
    return pairs


def build_index(
    path: str | os.PathLike[str],
    *,
    force: bool = False,
    alphabet_check: str | None = "dna",
    empty_records: str = "error",
) -> list[Path]:
    """Write the ``.fai`` (and for bgzip the ``.gzi``) index next to a FASTA file.

    The FASTA is checked as :func:`~seqstate.io.fasta.iter_fasta` checks it (the
    same messages).  Both files are written all-or-nothing through
    :class:`~seqstate.io.atomic.OutputSet`; an index that exists is replaced
    only with ``force``.  Returns the paths written.  Raises
    :class:`~seqstate.errors.SequenceFormatError` for a FASTA that cannot be
    read or indexed (standard input, plain gzip, unequal lines) and
    :class:`~seqstate.errors.UsageError` for an index that exists (without
    ``force``) or cannot be written.
    """
    index = _build(path, alphabet_check, empty_records, want_gzi=True)
    return _write(path, index, force=force)


def _build(
    path: str | os.PathLike[str],
    alphabet_check: str | None,
    empty_records: str,
    *,
    want_gzi: bool,
    entries: list[FaiEntry] | None = None,
) -> FastaIndex:
    shown = files.display_name(path)
    kind = compression_of(path)
    if kind == "stdin":
        raise UsageError("standard input cannot be indexed: give a FASTA file name")
    if kind == "gzip":
        _reader_error(path, alphabet_check, empty_records)
        raise SequenceFormatError(
            "is gzip-compressed without blocks (not bgzip), so it cannot be indexed; "
            "compress it with bgzip for random access",
            path=shown,
        )
    if kind == "other":
        _reader_error(path, alphabet_check, empty_records)  # names what the file is
        raise SequenceFormatError("cannot be indexed", path=shown)
    if entries is None:
        entries = _scan_file(path, kind, alphabet_check, empty_records)
    gzi = _scan_blocks(path) if kind == "bgzip" and want_gzi else None
    return FastaIndex(Path(path), kind, {e.name: e for e in entries}, gzi)


def _write(
    path: str | os.PathLike[str], index: FastaIndex, *, force: bool, only_missing: bool = False
) -> list[Path]:
    """Write the index files (all-or-nothing); with ``only_missing`` those that do not exist."""
    texts: list[tuple[Path, bytes]] = [
        (fai_path(path), format_fai(list(index.entries.values())).encode("utf-8"))
    ]
    if index.gzi is not None:
        texts.append((gzi_path(path), format_gzi(index.gzi)))
    if only_missing:
        texts = [(p, data) for p, data in texts if not p.exists()]
    try:
        with OutputSet(force=force, inputs=[path]) as outs:
            for name, data in texts:
                outs.path(name).write_bytes(data)
    except OSError as exc:
        raise UsageError(f"index of {path} cannot be written: {exc.strerror or exc}") from None
    return [p for p, _ in texts]


# ---------------------------------------------------------------- using an index


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


def _check_entry(index: FastaIndex, e: FaiEntry) -> None:
    """The bytes at ``e``'s offset are its header line, its bases and its end."""
    if e.name in index.checked:
        return
    header = _header_line(index, e)
    # the record ID as the FASTA reader takes it: the first word of the decoded header
    text = header[1:].decode("utf-8", errors="replace")
    words = text.split(None, 1) if header.startswith(b">") else []
    if not words or words[0] != e.name:
        shown = header[:40].decode("utf-8", errors="replace")
        raise _Stale(
            f"record '{e.name}': the line before offset {e.offset} is {shown!r}, not its header"
        )
    if e.length:
        last = e.byte_of(e.length - 1)
        tail = index.read(last, last + 3)
        ok = (
            len(tail) >= 1
            and tail[:1] not in (b">", b"\n", b"\r", b" ")
            and (len(tail) == 1 or tail[1:2] == b"\n" or tail[1:3] == b"\r\n")
        )
        if not ok:
            raise _Stale(
                f"record '{e.name}': its last base (length {e.length}) is not where the "
                "index puts it"
            )
        if e.length > e.line_bases:
            eol = e.byte_of(e.line_bases - 1) + 1
            mark = index.read(eol, e.offset + e.line_width)
            if mark.strip(b"\r\n") or not mark.endswith(b"\n"):
                raise _Stale(f"record '{e.name}': its lines are not {e.line_width} bytes long")
    index.checked.add(e.name)


def _check_index(index: FastaIndex, fai: Path) -> None:
    """The whole-file checks: the first and last records, the file size."""
    entries = list(index.entries.values())
    if not entries:
        raise _Stale("it lists no records")
    last = max(entries, key=lambda e: e.offset)
    end = last.byte_of(last.length - 1) + 1 if last.length else last.offset
    size = index.size()
    if end > size:
        raise _Stale(f"record '{last.name}' ends at byte {end}, past the end of the file ({size})")
    if size - end > _BLOCK_MAX:
        raise _Stale(f"the file has {size - end:,} bytes after its last indexed record")
    _check_entry(index, entries[0])
    _check_entry(index, last)
    # an index cut short at a line boundary lists fewer records than the file holds:
    # only line ends and blank space may follow the last record it lists
    if size > end and index.read(end, size).strip(_WHITESPACE):
        raise _Stale(
            f"the file goes on after record '{last.name}', the last one the index lists "
            "(the index lacks the records after it)"
        )


_MEMORY: dict[tuple[str, int, int], FastaIndex] = {}
_SAID: set[str] = set()


def _say_once(key: str, text: str) -> None:
    if key not in _SAID:
        _SAID.add(key)
        log.note(f"note: {text}")


def _stale_error(path: str | os.PathLike[str], what: Path, reason: str) -> SequenceFormatError:
    return SequenceFormatError(
        f"index does not match {os.fspath(path)}: {reason}; {_rebuild_hint(path)}",
        path=str(what),
    )


def load_index(
    path: str | os.PathLike[str],
    *,
    build: bool = True,
    alphabet_check: str | None = "dna",
) -> FastaIndex | None:
    """The checked index of a FASTA file, or None when it cannot be used.

    None for standard input, plain gzip (for a file of at least
    :data:`AUTO_INDEX_BYTES`, one ``note:`` says bgzip gives random access),
    another compression or a missing file (the stream reader names the
    problem), a file without an index when ``build`` is False or the file
    is smaller than :data:`AUTO_INDEX_BYTES`, and a FASTA whose lines a
    ``.fai`` cannot describe (with a note).  A missing index of a large file is
    built next to it (or in memory, with a note, when the folder is not
    writable).  Raises :class:`~seqstate.errors.SequenceFormatError` for an
    index that is malformed, older than its FASTA or not matching its bytes.
    """
    kind = compression_of(path)
    shown = files.display_name(path)
    if kind == "gzip":
        if os.path.getsize(path) < AUTO_INDEX_BYTES:
            return None  # small: streaming costs no more, nothing to say
        _say_once(
            f"gzip:{shown}",
            f"{shown} is plain gzip, read from the start (bgzip gives random access to regions)",
        )
        return None
    if kind not in ("plain", "bgzip"):
        return None
    stat = os.stat(path)
    key = (os.path.realpath(path), stat.st_size, stat.st_mtime_ns)
    if key in _MEMORY:
        return _MEMORY[key]
    fai = fai_path(path)
    gzi = gzi_path(path) if kind == "bgzip" else None
    have_fai = fai.is_file()
    have_gzi = gzi is None or gzi.is_file()
    if not have_fai or not have_gzi:
        if not build or stat.st_size < AUTO_INDEX_BYTES:
            return None
        index = _first_use(path, kind, fai if have_fai else None, alphabet_check, stat)
        if index is None:
            return None
    else:
        index = _read_index(path, kind, fai, gzi, stat)
    try:
        _check_index(index, fai)
    except _Stale as exc:
        raise _stale_error(path, fai, str(exc)) from None
    _MEMORY[key] = index
    return index


def _read_index(
    path: str | os.PathLike[str], kind: str, fai: Path, gzi: Path | None, stat: os.stat_result
) -> FastaIndex:
    for name in (fai, gzi):
        if name is not None and os.stat(name).st_mtime_ns < stat.st_mtime_ns:
            raise SequenceFormatError(
                f"index is older than {os.fspath(path)} (the FASTA changed after it was "
                f"indexed); {_rebuild_hint(path)}",
                path=str(name),
            )
    try:
        entries = parse_fai(fai.read_text(encoding="utf-8"), str(fai))
        pairs = parse_gzi(gzi.read_bytes(), str(gzi)) if gzi is not None else None
        if pairs and pairs[-1][0] >= stat.st_size:
            k = next(i for i, (c, _) in enumerate(pairs) if c >= stat.st_size)
            raise SequenceFormatError(
                f"block {k + 1} starts at compressed byte {pairs[k][0]:,}, past the end of "
                f"{os.fspath(path)} ({stat.st_size:,} bytes)",
                path=str(gzi),
            )
    except UnicodeDecodeError:
        raise SequenceFormatError(
            f"is not UTF-8 text (not a .fai index?); {_rebuild_hint(path)}", path=str(fai)
        ) from None
    except SequenceFormatError as exc:
        raise SequenceFormatError(
            f"{exc.message}; {_rebuild_hint(path)}", path=exc.path, line0=exc.line0, where=exc.where
        ) from None
    except OSError as exc:
        raise SequenceFormatError(f"cannot be read: {exc.strerror or exc}", path=str(fai)) from None
    return FastaIndex(Path(path), kind, {e.name: e for e in entries}, pairs)


def _writable(folder: Path) -> bool:
    """True if index files may be created in ``folder``."""
    return os.access(folder, os.W_OK | os.X_OK)


def _first_use(
    path: str | os.PathLike[str],
    kind: str,
    fai_ok: Path | None,
    alphabet_check: str | None,
    stat: os.stat_result,
) -> FastaIndex | None:
    """Build the missing index files of a large FASTA: next to it, or in memory."""
    shown = files.display_name(path)
    entries = None
    if fai_ok is not None:  # a bgzip file with a .fai and no .gzi: keep the .fai
        entries = _read_index(path, "plain", fai_ok, None, stat).entries
    try:
        index = _build(
            path,
            alphabet_check,
            "skip",
            want_gzi=True,
            entries=list(entries.values()) if entries else None,
        )
    except SequenceFormatError as exc:
        if not exc.message.startswith("cannot be indexed"):
            raise
        _say_once(f"layout:{shown}", f"{shown} {exc.message}; reading it whole")
        return None
    if _writable(Path(path).parent):
        try:
            wrote = _write(path, index, force=False, only_missing=True)
            _say_once(f"built:{shown}", f"indexed {shown}: wrote {', '.join(map(str, wrote))}")
            return index
        except (UsageError, OSError):
            pass
    _say_once(
        f"memory:{shown}",
        f"cannot write an index next to {shown}: kept in memory for this run "
        "(seqstate index FASTA in a writable folder saves it)",
    )
    return index


def _lengths(index: FastaIndex) -> dict[str, int]:
    return {e.name: e.length for e in index.entries.values() if e.length > 0}


def record_lengths(
    path: str | os.PathLike[str], *, alphabet_check: str | None = "dna", build: bool = True
) -> dict[str, int] | None:
    """Record ID -> length (bases) of every non-empty record, in file order, from the
    index (built on first use as :func:`load_index` says); None when the file has
    no usable index (the caller streams)."""
    index = load_index(path, build=build, alphabet_check=alphabet_check)
    if index is None:
        return None
    return _lengths(index)


def region_record(
    path: str | os.PathLike[str],
    region: Region,
    *,
    alphabet_check: str | None = "dna",
    build: bool = True,
) -> Record | None:
    """The bases of ``region`` as a :class:`~seqstate.io.fasta.Record`, read through the index.

    ``region`` is 0-based half-open on record ``region.seqid``; ``end0`` may be
    :data:`~seqstate.io.regions.TO_END` (the record's end).  The record's
    ``seq`` holds only the region's bases (``seq[0]`` is the base at
    ``region.start0``), its ``description`` is that of the header.  Returns None
    when the file has no usable index (see :func:`load_index`; the caller then
    streams).  Raises :class:`~seqstate.errors.UsageError` for an unknown record
    or a region outside it (the words of
    :func:`~seqstate.io.regions.check_region`),
    :class:`~seqstate.errors.SequenceFormatError` for a stale or mismatched
    index (the message says how to rebuild it) and, with
    ``alphabet_check="dna"``, for a character inside the region that is not a
    nucleotide or IUPAC code.
    """
    index = load_index(path, build=build, alphabet_check=alphabet_check)
    if index is None:
        return None
    region = check_region(region, _lengths(index))
    source = IndexedSource(index, index.entries[region.seqid], alphabet_check, path)
    seq = source.read(region.start0, region.end0)
    return Record(id=source.id, description=source.description, seq=seq)


class IndexedSource:
    """The bases of one record, read by range through the FASTA index.

    The shape of a sequence source (``length``, ``read(start0, end0)``,
    ``close()``): ``read`` returns the raw bases ``[start0, end0)`` (0-based
    half-open, case kept, line ends removed), checked against the index and,
    with ``alphabet_check="dna"``, against :data:`~seqstate.io.fasta.DNA_ALPHABET`.
    Reads open the file each time, so one source may be read from several threads.
    """

    def __init__(
        self,
        index: FastaIndex,
        entry: FaiEntry,
        alphabet_check: str | None,
        path: str | os.PathLike[str] | None = None,
    ) -> None:
        self._path = index.path if path is None else path
        self._index = index
        self._entry = entry
        self._check = alphabet_check
        self.id = entry.name
        self.length = entry.length
        try:
            _check_entry(index, entry)
            words = _header_of(index, entry).split(None, 1)
        except _Stale as exc:
            raise _stale_error(self._path, fai_path(self._path), str(exc)) from None
        self.description = words[1].strip() if len(words) > 1 else ""

    def read(self, start0: int, end0: int) -> bytes:
        """The bases ``[start0, end0)``; ValueError unless ``0 <= start0 < end0 <= length``."""
        if not 0 <= start0 < end0 <= self.length:
            raise ValueError(f"range {start0}-{end0} is outside 0-{self.length}")
        try:
            seq = _bases(self._index, self._entry, start0, end0)
        except _Stale as exc:
            raise _stale_error(self._path, fai_path(self._path), str(exc)) from None
        if self._check == "dna":
            bad = seq.translate(None, _DNA_BYTES)
            if bad:
                i = seq.index(bad[:1])
                ch = bad[0]
                what = repr(chr(ch)) if ch < 0x80 else f"byte 0x{ch:02X}"
                raise SequenceFormatError(
                    f"character {what} at position {start0 + i + 1} is not a nucleotide or "
                    f"IUPAC ambiguity code (expected one of {DNA_ALPHABET} in either case)",
                    path=files.display_name(self._path),
                    where=f"record '{self.id}'",
                )
        return seq

    def close(self) -> None:
        """Nothing to release (each read opens the file)."""


def record_source(
    path: str | os.PathLike[str],
    seqid: str,
    *,
    alphabet_check: str | None = "dna",
    build: bool = True,
) -> IndexedSource | None:
    """The record ``seqid`` as an :class:`IndexedSource`; None when the file has no
    usable index (see :func:`load_index`).  Raises
    :class:`~seqstate.errors.UsageError` for an unknown (or empty) record, with the
    words of :func:`~seqstate.io.regions.check_region`, and
    :class:`~seqstate.errors.SequenceFormatError` for a stale index."""
    index = load_index(path, build=build, alphabet_check=alphabet_check)
    if index is None:
        return None
    check_region(Region(seqid, 0, TO_END), _lengths(index))
    return IndexedSource(index, index.entries[seqid], alphabet_check, path)


def _header_line(index: FastaIndex, e: FaiEntry) -> bytes:
    """The line that ends just before ``e``'s offset (its header, ``>`` included).

    Looked for in windows that grow fourfold from 4 KiB: a header of any length is found
    (the stream reader takes any), in reads of a few times its length at most.
    """
    window = 4096
    while True:
        begin = max(0, e.offset - window)
        before = index.read(begin, e.offset)
        if not before.endswith(b"\n"):
            raise _Stale(f"record '{e.name}': offset {e.offset} is not the start of a line")
        nl = before.rfind(b"\n", 0, len(before) - 1)
        if nl >= 0 or begin == 0:
            line = before[nl + 1 :].rstrip(b"\r\n")
            if nl < 0 and line.startswith(files.UTF8_BOM):
                line = line[len(files.UTF8_BOM) :]
            return line
        window *= 4


def _header_of(index: FastaIndex, e: FaiEntry) -> str:
    return _header_line(index, e)[1:].decode("utf-8", errors="replace")


def _bases(index: FastaIndex, e: FaiEntry, start0: int, end0: int) -> bytes:
    """Bases ``[start0, end0)`` of record ``e``, line ends removed and their places checked."""
    first = e.byte_of(start0)
    last = e.byte_of(end0 - 1) + 1
    raw = index.read(first, last)
    seq = raw.translate(None, b"\r\n")
    breaks = (end0 - 1) // e.line_bases - start0 // e.line_bases
    ok = len(seq) == end0 - start0 and len(raw) - len(seq) == breaks * (e.line_width - e.line_bases)
    if ok and breaks:
        # each line feed where the index puts it: after the last base of each full line
        arr = np.frombuffer(raw, dtype=np.uint8)
        first_lf = (e.line_bases - start0 % e.line_bases) + (e.line_width - e.line_bases) - 1
        at = first_lf + e.line_width * np.arange(breaks)
        ok = bool(np.all(arr[at] == 10)) and raw.count(b"\n") == breaks
    if not ok:
        raise _Stale(
            f"record '{e.name}': bases {start0 + 1}-{end0} are not where the index puts them"
        )
    return seq


def clear_memory() -> None:
    """Forget indexes kept in memory and notes given (tests; a long-lived process)."""
    _MEMORY.clear()
    _SAID.clear()
