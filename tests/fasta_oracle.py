"""Test oracle: the whole-file FASTA reader of seqstate as it was before streaming.

Kept unchanged (reading part only) so the streaming reader in seqstate.io.fasta can be
checked against it on any input and any chunk size.  Original docstring:

FASTA input and output.

A record's sequence is kept as the raw ASCII bytes of the file, case kept and
every whitespace character removed.  Positions in messages are 1-based (the
first base of a record is position 1), as are file line numbers; inside the
program sequences are indexed 0-based like any Python ``bytes``.

The header line ``>chr1 some words`` gives the record ID ``chr1`` (the first
word after ``>``, split on whitespace as Biopython's FASTA parser does) and the
description ``some words`` (the rest of the line, stripped; ``""`` if none).
Note that, unlike Biopython's ``SeqRecord.description``, the description here
does not repeat the ID.
"""

from __future__ import annotations

import re
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import BinaryIO

from seqstate.errors import SequenceFormatError
from seqstate.io import files
from seqstate.io.files import display_name, open_input

__all__ = [
    "DNA_ALPHABET",
    "EMPTY_RECORD_CHOICES",
    "Record",
    "SkippedRecord",
    "iter_fasta",
    "parse_fasta",
    "read_fasta",
]

#: Characters accepted in a record when ``alphabet_check="dna"``: the four
#: bases, U, the IUPAC ambiguity codes, N, and '-' as gap, in either case.
#: Nothing else is accepted (not '.', '*', 'X' or digits).
DNA_ALPHABET = "ACGTURYSWKMBDHVN-"

_DNA_BYTES = (DNA_ALPHABET + DNA_ALPHABET.lower()).encode("ascii")
_WHITESPACE = b" \t\r\n\v\f"
_SNIPPET = 40


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
    Errors are raised when the generator reaches them, so records before the
    problem may already have been yielded.
    """
    shown = display_name(path)
    _check_options(alphabet_check, empty_records)
    with open_input(path, SequenceFormatError, "FASTA") as handle:
        data = _read_all(handle, shown)
    yield from _checked_records(data, shown, alphabet_check, empty_records, skipped)


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
    data = _read_all(handle, shown)
    yield from _checked_records(data, shown, alphabet_check, empty_records, skipped)


def _check_options(alphabet_check: str | None, empty_records: str) -> None:
    if alphabet_check not in ("dna", None):
        raise ValueError(f"alphabet_check must be 'dna' or None, not {alphabet_check!r}")
    if empty_records not in EMPTY_RECORD_CHOICES:
        raise ValueError(f"empty_records must be 'skip' or 'error', not {empty_records!r}")


def _read_all(handle: BinaryIO, shown: str) -> bytes:
    try:
        return handle.read()
    except files.READ_ERRORS as exc:
        raise files.read_error(exc, shown, SequenceFormatError) from None


def _checked_records(
    data: bytes,
    shown: str,
    alphabet_check: str | None,
    empty_records: str,
    skipped: list[SkippedRecord] | None,
) -> Iterator[Record]:
    check = alphabet_check == "dna"
    seen: dict[str, int] = {}
    left_out: list[SkippedRecord] = []
    n = 0
    for record in _records_of(data, shown, check, seen):
        if isinstance(record, SkippedRecord):
            if empty_records == "error":
                raise SequenceFormatError(
                    f"record '{record.id}' has an empty sequence (expected at least one base)",
                    path=shown,
                    line0=record.line0,
                    where=f"record '{record.id}'",
                )
            left_out.append(record)
            if skipped is not None:
                skipped.append(record)
            continue
        n += 1
        yield record
    if n == 0 and left_out:
        raise SequenceFormatError(
            f"every record is empty ({len(left_out)} header line(s) with no sequence); "
            "expected at least one record with bases",
            path=shown,
            line0=left_out[0].line0,
        )


def _records_of(
    data: bytes, shown: str, check: bool, seen: dict[str, int]
) -> Iterator[Record | SkippedRecord]:
    """Split a whole FASTA text into records, with the checks of :func:`iter_fasta`.

    Works on whole sequence blocks (one ``translate`` per record, not per line);
    only when a block holds a bad character is it scanned line by line to name
    the line and position.  A record without bases comes out as a
    :class:`SkippedRecord`.
    """
    first = re.search(rb"\S", data)
    if first is None:
        if not data:
            raise SequenceFormatError("no FASTA records found (empty file)", path=shown)
        raise SequenceFormatError("no FASTA records found (only blank lines)", path=shown)
    # header lines: '>' at the start of the data or after a newline
    starts = [0] if data[:1] == b">" else []
    pos = data.find(b"\n>")
    while pos >= 0:
        starts.append(pos + 1)
        pos = data.find(b"\n>", pos + 1)
    first_text = first.start()
    if not starts or starts[0] > first_text:
        # text before the first header: the line of the first non-blank character
        line0 = data.count(b"\n", 0, first_text)
        line_end = data.find(b"\n", first_text)
        raw = data[first_text : line_end if line_end >= 0 else len(data)]
        raise SequenceFormatError(
            f"not a FASTA file: expected a header line starting with '>', found {_snippet(raw)!r}",
            path=shown,
            line0=line0,
        )
    if b"\r" in data:
        lone = re.search(rb"\r(?!\n)", data)
        if lone is not None:
            raise SequenceFormatError(
                files.CR_ONLY, path=shown, line0=data.count(b"\n", 0, lone.start())
            )
    line0 = data.count(b"\n", 0, starts[0])
    for k, h in enumerate(starts):
        nl = data.find(b"\n", h)
        header_end = len(data) if nl < 0 else nl + 1
        block_end = starts[k + 1] if k + 1 < len(starts) else len(data)
        header0 = line0
        rid, desc = _parse_header(data[h:header_end], shown, header0)
        if rid in seen:
            raise SequenceFormatError(
                f"duplicate record ID '{rid}' (first used on line {seen[rid] + 1})",
                path=shown,
                line0=header0,
                where=f"record '{rid}'",
            )
        seen[rid] = header0
        block = data[header_end:block_end]
        seq = block.translate(None, _WHITESPACE)
        if check and seq.translate(None, _DNA_BYTES):
            _raise_bad_character(block, shown, rid, header0 + 1)
        if seq:
            yield Record(id=rid, description=desc, seq=seq)
        else:
            yield SkippedRecord(id=rid, line0=header0, reason="empty")
        line0 = header0 + 1 + block.count(b"\n")


def _raise_bad_character(block: bytes, shown: str, rid: str, first_line0: int) -> None:
    """Name the line and 1-based record position of the first bad character of a block."""
    done = 0
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
