"""Building the ``.fai`` (and ``.gzi``) index of a FASTA file: one pass over the records'
lines (:func:`scan_fasta`), the bgzip blocks (from Biopython's :mod:`Bio.bgzf`), and the
index files written beside the FASTA (:func:`build_index`, ``seqstate index``).

Formats and the layout a record must have: see :mod:`seqstate.io.faidx`.  Offsets are
0-based byte offsets; line numbers in messages are 1-based.
"""

from __future__ import annotations

import gzip
import os
from dataclasses import dataclass
from pathlib import Path
from typing import BinaryIO

import numpy as np
from Bio import bgzf

from seqstate.errors import SequenceFormatError, UsageError
from seqstate.io import files
from seqstate.io.atomic import OutputSet
from seqstate.io.faidx_files import (
    FaiEntry,
    FastaIndex,
    compression_of,
    fai_path,
    format_fai,
    format_gzi,
    gzi_path,
)
from seqstate.io.fasta import DNA_ALPHABET, iter_fasta

#: Bytes read per step while building an index.
_CHUNK = 8 << 20

_DNA_BYTES = (DNA_ALPHABET + DNA_ALPHABET.lower()).encode("ascii")
_WHITESPACE = b" \t\r\n\v\f"
_INNER_SPACE = b" \t\v\f"

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
