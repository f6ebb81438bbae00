"""FASTA input and output.

A record's sequence is kept as the raw ASCII bytes of the file, case kept and
every whitespace character removed.  Positions in messages are 1-based (the
first base of a record is position 1), as are file line numbers; inside the
program sequences are indexed 0-based like any Python ``bytes``.

The header line ``>chr1 some words`` gives the record ID ``chr1`` (the first
word after ``>``, split on whitespace as Biopython's FASTA parser does) and the
description ``some words`` (the rest of the line, stripped; ``""`` if none).
Note that, unlike Biopython's ``SeqRecord.description``, the description here
does not repeat the ID.

Reading streams: the input is read :data:`CHUNK_BYTES` at a time and records come
out one at a time, so memory holds one chunk and the record being read
(:func:`iter_fasta`, :class:`Record` with its bytes) or, with
:func:`iter_sequences`, not even that: a long record is spilled to a temporary
file while it is read and its bases are read back by range
(:class:`SequenceRecord`, :mod:`seqstate.io.sources`).
"""

from __future__ import annotations

import re
import weakref
from collections.abc import Callable, Generator, Iterable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any, BinaryIO, Protocol, TextIO, TypeVar

from seqstate.errors import SequenceFormatError
from seqstate.io import files
from seqstate.io.files import display_name, open_input
from seqstate.io.sources import BytesSource, SequenceSource, SpillSource

__all__ = [
    "CHUNK_BYTES",
    "DNA_ALPHABET",
    "EMPTY_RECORD_CHOICES",
    "Record",
    "SequenceRecord",
    "SkippedRecord",
    "iter_fasta",
    "iter_sequences",
    "parse_fasta",
    "read_fasta",
    "write_fasta",
]

#: Characters accepted in a record when ``alphabet_check="dna"``: the four
#: bases, U, the IUPAC ambiguity codes, N, and '-' as gap, in either case.
#: Nothing else is accepted (not '.', '*', 'X' or digits).
DNA_ALPHABET = "ACGTURYSWKMBDHVN-"

_DNA_BYTES = (DNA_ALPHABET + DNA_ALPHABET.lower()).encode("ascii")
_WHITESPACE = b" \t\r\n\v\f"
_SNIPPET = 40
_NON_SPACE = re.compile(rb"\S")
_LONE_CR = re.compile(rb"\r(?!\n)")
_GT = ord(">")
_LF = ord("\n")
#: Bytes read from the input at a time.
CHUNK_BYTES = 8 << 20
T = TypeVar("T")


@dataclass(frozen=True)
class Record:
    """One FASTA record.

    ``id`` is the first word of the header, ``description`` the rest of the
    header (may be empty) and ``seq`` the sequence as raw ASCII bytes exactly as
    in the file (case kept, whitespace removed).  ``seq[i]`` is the base at
    0-based position ``i``, i.e. at 1-based position ``i + 1``.
    """

    id: str
    description: str
    seq: bytes


def _snippet(raw: bytes) -> str:
    text = raw.rstrip(b"\r\n").decode("utf-8", errors="replace")
    if len(text) > _SNIPPET:
        text = text[:_SNIPPET] + "..."
    return text


def _describe_byte(value: int) -> str:
    if value < 0x80:
        return repr(chr(value))
    return f"byte 0x{value:02X}"


# ---------------------------------------------------------------- reading


@dataclass(frozen=True)
class SkippedRecord:
    """A record left out by the reader: its ID, the 0-based line of its header, why."""

    id: str
    line0: int
    reason: str


#: What the readers do with a record that has a header and no sequence.
EMPTY_RECORD_CHOICES = ("skip", "error")


def iter_fasta(
    path: str | Path,
    *,
    alphabet_check: str | None = "dna",
    empty_records: str = "error",
    skipped: list[SkippedRecord] | None = None,
) -> Iterator[Record]:
    """Yield the records of a FASTA file one at a time, checking as it goes.

    ``path`` is a file name or ``"-"`` for standard input; plain or gzip.
    With ``alphabet_check="dna"`` every sequence character must be one of
    :data:`DNA_ALPHABET` (either case); with ``None`` no character is checked
    (the caller validates other alphabets).  A record with a header and no
    sequence is an error with ``empty_records="error"``; with ``"skip"`` it is
    left out and, when ``skipped`` is a list, appended to it as a
    :class:`SkippedRecord` with reason ``"empty"`` (a file whose every record is
    empty is still an error).  Raises
    :class:`~seqstate.errors.SequenceFormatError` for a missing or unreadable
    file, an empty file, text that is not FASTA, CR-only line endings, a header
    without an ID, a repeated record ID or a character outside the alphabet.

    The file is read in chunks of :data:`CHUNK_BYTES`; only the record being read
    is held in memory (use :func:`iter_sequences` to hold not even that).  Errors
    are raised when the reader reaches them, so records before the problem may
    already have been yielded; CR-only line ends are looked for in each chunk
    before its records, so in a file of one chunk they are reported first.
    """
    shown = display_name(path)
    _check_options(alphabet_check, empty_records)
    with open_input(path, SequenceFormatError, "FASTA") as handle:
        yield from _checked(
            _parse(handle, shown, alphabet_check == "dna", _BytesSink),
            shown,
            empty_records,
            skipped,
            _to_record,
        )


def parse_fasta(
    handle: BinaryIO,
    shown: str,
    *,
    alphabet_check: str | None = "dna",
    empty_records: str = "error",
    skipped: list[SkippedRecord] | None = None,
) -> Iterator[Record]:
    """The records of an open binary ``handle`` (decompressed bytes, e.g. from
    :func:`~seqstate.io.files.open_input`), named ``shown`` in messages; same
    checks and options as :func:`iter_fasta`."""
    _check_options(alphabet_check, empty_records)
    yield from _checked(
        _parse(handle, shown, alphabet_check == "dna", _BytesSink),
        shown,
        empty_records,
        skipped,
        _to_record,
    )


@dataclass(frozen=True)
class SequenceRecord:
    """One record whose bases are read by range (short: in memory; long: spilled to a file).

    ``id`` and ``description`` as in :class:`Record`; ``length`` is the number of
    bases; ``source`` holds them (:mod:`seqstate.io.sources`); ``line0`` is the
    0-based line of the header, for messages.  Close ``source`` when done.
    """

    id: str
    description: str
    length: int
    source: SequenceSource
    line0: int

    def read(self, start0: int, end0: int) -> bytes:
        """Raw bases ``[start0, end0)`` (0-based half-open) as in the file."""
        return self.source.read(start0, end0)


def iter_sequences(
    path: str | Path,
    *,
    alphabet_check: str | None = "dna",
    empty_records: str = "error",
    skipped: list[SkippedRecord] | None = None,
    spill_above: int = 8 << 20,
    spill_dir: str | Path | None = None,
) -> Iterator[SequenceRecord]:
    """Records one at a time with bounded memory, whatever their length.

    A record of at most ``spill_above`` bases is kept in memory
    (:class:`~seqstate.io.sources.BytesSource`); a longer one is written, while
    it is read, to a temporary file in ``spill_dir`` (default:
    :func:`tempfile.gettempdir`, i.e. ``TMPDIR``) and read back by range from
    there (:class:`~seqstate.io.sources.SpillSource`, ``os.pread``).  The
    temporary file has no name in the folder; ``record.source.close()`` gives
    its space back, and so does dropping the record.  When the iteration ends
    early (generator closed, an exception, KeyboardInterrupt) every spill file
    this iterator made is closed, including those of records it already
    yielded.  A full spill folder raises :class:`~seqstate.errors.UsageError`
    naming it.  Input, options and errors as :func:`iter_fasta`.
    """
    if spill_above < 0:
        raise ValueError(f"spill_above must be >= 0, not {spill_above}")
    shown = display_name(path)
    _check_options(alphabet_check, empty_records)
    made: weakref.WeakSet[SpillSource] = weakref.WeakSet()

    def sink(rid: str) -> _SpillSink:
        return _SpillSink(spill_above, spill_dir, f"record '{rid}' of {shown}", made)

    with open_input(path, SequenceFormatError, "FASTA") as handle:
        records = _checked(
            _parse(handle, shown, alphabet_check == "dna", sink),
            shown,
            empty_records,
            skipped,
            _to_sequence_record,
        )
        try:
            yield from records
        except BaseException:
            records.close()
            for source in list(made):
                source.close()
            raise


def _check_options(alphabet_check: str | None, empty_records: str) -> None:
    if alphabet_check not in ("dna", None):
        raise ValueError(f"alphabet_check must be 'dna' or None, not {alphabet_check!r}")
    if empty_records not in EMPTY_RECORD_CHOICES:
        raise ValueError(f"empty_records must be 'skip' or 'error', not {empty_records!r}")


class _Sink(Protocol):
    """Where the parser puts one record's bases."""

    def add(self, seq: bytes) -> None: ...
    def result(self) -> Any: ...
    def discard(self) -> None: ...


class _BytesSink:
    """A record's bases gathered in memory, given back as one ``bytes``."""

    def __init__(self, rid: str) -> None:
        self._parts: list[bytes] = []

    def add(self, seq: bytes) -> None:
        self._parts.append(seq)

    def result(self) -> bytes:
        parts, self._parts = self._parts, []
        return parts[0] if len(parts) == 1 else b"".join(parts)

    def discard(self) -> None:
        self._parts = []


class _SpillSink:
    """A record's bases in memory up to ``limit``, past that in a spill file."""

    def __init__(
        self,
        limit: int,
        folder: str | Path | None,
        what: str,
        made: weakref.WeakSet[SpillSource],
    ) -> None:
        self._limit = limit
        self._folder = folder
        self._what = what
        self._made = made
        self._parts: list[bytes] = []
        self._size = 0
        self._spill: SpillSource | None = None

    def add(self, seq: bytes) -> None:
        if self._spill is not None:
            self._spill.append(seq)
            return
        self._parts.append(seq)
        self._size += len(seq)
        if self._size > self._limit:
            spill = SpillSource.create(self._folder, self._what)
            self._spill = spill
            self._made.add(spill)
            parts, self._parts = self._parts, []
            for part in parts:
                spill.append(part)

    def result(self) -> SequenceSource:
        if self._spill is not None:
            spill, self._spill = self._spill, None
            return spill.seal()
        parts, self._parts = self._parts, []
        return BytesSource(parts[0] if len(parts) == 1 else b"".join(parts))

    def discard(self) -> None:
        self._parts = []
        if self._spill is not None:
            spill, self._spill = self._spill, None
            spill.close()


def _to_record(rid: str, desc: str, line0: int, length: int, result: bytes) -> Record:
    return Record(id=rid, description=desc, seq=result)


def _to_sequence_record(
    rid: str, desc: str, line0: int, length: int, result: SequenceSource
) -> SequenceRecord:
    return SequenceRecord(id=rid, description=desc, length=length, source=result, line0=line0)


#: What the parser yields per record: (ID, description, header line0, bases, sink result).
_Parsed = tuple[str, str, int, int, Any]


def _checked(
    parsed: Generator[_Parsed | SkippedRecord, None, None],
    shown: str,
    empty_records: str,
    skipped: list[SkippedRecord] | None,
    make: Callable[[str, str, int, int, Any], T],
) -> Generator[T, None, None]:
    """The empty-record rule over the parser's output; ``make`` builds each record."""
    left_out: list[SkippedRecord] = []
    n = 0
    try:
        for item in parsed:
            if isinstance(item, SkippedRecord):
                if empty_records == "error":
                    raise SequenceFormatError(
                        f"record '{item.id}' has an empty sequence (expected at least one base)",
                        path=shown,
                        line0=item.line0,
                        where=f"record '{item.id}'",
                    )
                left_out.append(item)
                if skipped is not None:
                    skipped.append(item)
                continue
            n += 1
            yield make(*item)
    except BaseException:
        parsed.close()
        raise
    if n == 0 and left_out:
        raise SequenceFormatError(
            f"every record is empty ({len(left_out)} header line(s) with no sequence); "
            "expected at least one record with bases",
            path=shown,
            line0=left_out[0].line0,
        )


def _read_chunk(handle: BinaryIO, shown: str) -> bytes:
    try:
        return handle.read(CHUNK_BYTES)
    except files.READ_ERRORS as exc:
        raise files.read_error(exc, shown, SequenceFormatError) from None


def _header_at(data: bytes, pos: int, at_bol: bool) -> int:
    """Index of the next header ('>' at a line start) at or after ``pos``, or -1.

    ``at_bol`` says whether ``data[0]`` starts a line (the data before ended in LF).
    """
    if pos < len(data) and data[pos] == _GT and (data[pos - 1] == _LF if pos else at_bol):
        return pos
    found = data.find(b"\n>", pos)
    return found + 1 if found >= 0 else -1


def _not_fasta(
    data: bytes, first: int, line0: int, handle: BinaryIO, shown: str, eof: bool
) -> SequenceFormatError:
    """The error for text before the first header, starting at ``data[first]``."""
    line_end = data.find(b"\n", first)
    raw = data[first : line_end if line_end >= 0 else len(data)]
    # enough of the line for the shown copy, when it goes on in the next chunk
    while line_end < 0 and not eof and len(raw) < 4 * (_SNIPPET + 1):
        more = _read_chunk(handle, shown)
        if not more:
            break
        line_end = more.find(b"\n")
        raw += more[: line_end if line_end >= 0 else len(more)]
    return SequenceFormatError(
        f"not a FASTA file: expected a header line starting with '>', found {_snippet(raw)!r}",
        path=shown,
        line0=line0,
    )


def _parse(
    handle: BinaryIO, shown: str, check: bool, new_sink: Callable[[str], _Sink]
) -> Generator[_Parsed | SkippedRecord, None, None]:
    """Split a FASTA stream into records, with the checks of :func:`iter_fasta`.

    Reads :data:`CHUNK_BYTES` at a time and works on whole sequence blocks of a
    chunk (one ``translate`` per block, not per line); only when a block holds a
    bad character is it scanned line by line to name the line and position.  A
    carriage return at the end of a chunk is kept for the next one, so a CRLF
    split between chunks is still one line end.  A record without bases comes
    out as a :class:`SkippedRecord`.
    """
    seen: dict[str, int] = {}
    line = 0  # 0-based line of data[pos]
    at_bol = True  # the data before this chunk ended a line
    started = False  # the first header was found
    got_bytes = False
    early_cr: int | None = None  # line of a lone CR in blank lines before the first header
    header: list[bytes] | None = None  # pieces of a header line being read
    header0 = 0
    rid = desc = ""
    sink: _Sink | None = None
    length = 0
    tail = b""
    eof = False
    try:
        while not eof:
            chunk = _read_chunk(handle, shown)
            eof = not chunk
            data = tail + chunk if tail else chunk
            tail = b""
            if not eof and data.endswith(b"\r"):
                tail, data = b"\r", data[:-1]
            got_bytes = got_bytes or bool(data) or bool(tail)
            pos = 0
            first_line = line
            if not started:
                found = _NON_SPACE.search(data)
                if found is None:
                    if early_cr is None and b"\r" in data:
                        lone = _LONE_CR.search(data)
                        if lone is not None:
                            early_cr = line + data.count(b"\n", 0, lone.start())
                    line += data.count(b"\n")
                    if data:
                        at_bol = data.endswith(b"\n")
                    continue
                first = found.start()
                line_first = line + data.count(b"\n", 0, first)
                if data[first] != _GT or not (data[first - 1] == _LF if first else at_bol):
                    raise _not_fasta(data, first, line_first, handle, shown, eof)
                if early_cr is not None:
                    raise SequenceFormatError(files.CR_ONLY, path=shown, line0=early_cr)
                started = True
                pos = first
                line = header0 = line_first
                header = []
            if b"\r" in data:
                lone = _LONE_CR.search(data)
                if lone is not None:
                    raise SequenceFormatError(
                        files.CR_ONLY,
                        path=shown,
                        line0=first_line + data.count(b"\n", 0, lone.start()),
                    )
            n = len(data)
            while pos < n:
                if header is not None:
                    nl = data.find(b"\n", pos)
                    if nl < 0:
                        header.append(data[pos:])
                        pos = n
                        break
                    header.append(data[pos : nl + 1])
                    pos = nl + 1
                    rid, desc = _start_record(b"".join(header), shown, header0, seen)
                    header = None
                    line = header0 + 1
                    sink = new_sink(rid)
                    length = 0
                    continue
                assert sink is not None
                h = _header_at(data, pos, at_bol)
                end = h if h >= 0 else n
                if end > pos:
                    block = data[pos:end]
                    seq = block.translate(None, _WHITESPACE)
                    if check and seq.translate(None, _DNA_BYTES):
                        _raise_bad_character(block, shown, rid, line, length)
                    if seq:
                        sink.add(seq)
                        length += len(seq)
                    line += block.count(b"\n")
                if h < 0:
                    pos = n
                    break
                done, sink = sink, None
                yield _finish(rid, desc, header0, length, done)
                header = []
                header0 = line
                pos = h
            if data:
                at_bol = data.endswith(b"\n")
        if not started:
            if not got_bytes:
                raise SequenceFormatError("no FASTA records found (empty file)", path=shown)
            raise SequenceFormatError("no FASTA records found (only blank lines)", path=shown)
        if header is not None:  # the last line is a header without a line end
            rid, desc = _start_record(b"".join(header), shown, header0, seen)
            header = None
            sink = new_sink(rid)
            length = 0
        if sink is not None:
            done, sink = sink, None
            yield _finish(rid, desc, header0, length, done)
    except BaseException:
        if sink is not None:
            sink.discard()
        raise


def _start_record(raw: bytes, shown: str, header0: int, seen: dict[str, int]) -> tuple[str, str]:
    """The ID and description of a header line; a repeated ID is an error."""
    rid, desc = _parse_header(raw, shown, header0)
    if rid in seen:
        raise SequenceFormatError(
            f"duplicate record ID '{rid}' (first used on line {seen[rid] + 1})",
            path=shown,
            line0=header0,
            where=f"record '{rid}'",
        )
    seen[rid] = header0
    return rid, desc


def _finish(rid: str, desc: str, header0: int, length: int, sink: _Sink) -> _Parsed | SkippedRecord:
    if length == 0:
        sink.discard()
        return SkippedRecord(id=rid, line0=header0, reason="empty")
    return rid, desc, header0, length, sink.result()


def _raise_bad_character(block: bytes, shown: str, rid: str, first_line0: int, done: int) -> None:
    """Name the line and 1-based record position of the first bad character of a block.

    ``block`` starts on line ``first_line0`` (perhaps inside it) after ``done``
    bases of the record.
    """
    for i, raw in enumerate(block.split(b"\n")):
        chunk = raw.translate(None, _WHITESPACE)
        bad = chunk.translate(None, _DNA_BYTES)
        if bad:
            index = chunk.index(bad[:1])
            raise SequenceFormatError(
                f"character {_describe_byte(bad[0])} at position {done + index + 1} is not a "
                f"nucleotide or IUPAC ambiguity code (expected one of {DNA_ALPHABET} "
                "in either case)",
                path=shown,
                line0=first_line0 + i,
                where=f"record '{rid}'",
            )
        done += len(chunk)


def _parse_header(raw: bytes, shown: str, line0: int) -> tuple[str, str]:
    nul = raw.find(b"\0")
    if nul >= 0:
        raise SequenceFormatError(
            f"header line has a NUL byte (0x00) at column {nul + 1}; expected text (a record "
            "ID, then an optional description)",
            path=shown,
            line0=line0,
        )
    try:
        title = raw[1:].decode("utf-8")
    except UnicodeDecodeError:
        raise SequenceFormatError(
            "header line is not valid UTF-8 text", path=shown, line0=line0
        ) from None
    parts = title.split(None, 1)
    if not parts:
        raise SequenceFormatError("header line has no record ID after '>'", path=shown, line0=line0)
    rid = parts[0]
    desc = parts[1].strip() if len(parts) > 1 else ""
    return rid, desc


def read_fasta(
    path: str | Path,
    *,
    alphabet_check: str | None = "dna",
    empty_records: str = "error",
    skipped: list[SkippedRecord] | None = None,
) -> list[Record]:
    """Read every record of a FASTA file; same input, checks and options as :func:`iter_fasta`."""
    return list(
        iter_fasta(
            path, alphabet_check=alphabet_check, empty_records=empty_records, skipped=skipped
        )
    )


# ---------------------------------------------------------------- writing


def write_fasta(handle: TextIO, records: Iterable[Record], width: int = 60) -> None:
    """Write records to a text handle as FASTA, ``width`` bases a line.

    The header is ``>id description`` (just ``>id`` when the description is
    empty).  Raises ``ValueError`` for an ID that is empty or contains
    whitespace, for an empty sequence, or for ``width < 1``.
    """
    if width < 1:
        raise ValueError(f"width must be at least 1, not {width}")
    for record in records:
        if not record.id or record.id.split() != [record.id]:
            raise ValueError(f"record ID {record.id!r} is empty or contains whitespace")
        if not record.seq:
            raise ValueError(f"record '{record.id}' has an empty sequence")
        desc = " ".join(record.description.split())
        handle.write(f">{record.id} {desc}\n" if desc else f">{record.id}\n")
        seq = record.seq.decode("ascii")
        step = width * 10_000
        for block in range(0, len(seq), step):
            part = seq[block : block + step]
            handle.write("".join(part[i : i + width] + "\n" for i in range(0, len(part), width)))
