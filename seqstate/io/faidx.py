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

Where things are: this module reads regions through an index (loading and checking it,
building it on first use); :mod:`seqstate.io.faidx_files` parses and writes the ``.fai``
and ``.gzi`` files and holds the in-memory :class:`FastaIndex`;
:mod:`seqstate.io.faidx_build` scans a FASTA and writes its index.  Their public names
are importable from here.

Coordinates: a :class:`~seqstate.io.regions.Region` is 0-based half-open;
offsets are 0-based byte offsets; line numbers in messages are 1-based.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

from seqstate import log
from seqstate.errors import SequenceFormatError, UsageError
from seqstate.io import files
from seqstate.io.faidx_build import _DNA_BYTES, _WHITESPACE, _build, _write, build_index, scan_fasta
from seqstate.io.faidx_files import (
    _BLOCK_MAX,
    FaiEntry,
    FastaIndex,
    _rebuild_hint,
    _Stale,
    compression_of,
    fai_path,
    format_fai,
    format_gzi,
    gzi_path,
    parse_fai,
    parse_gzi,
)
from seqstate.io.fasta import DNA_ALPHABET, Record
from seqstate.io.fasta import iter_fasta as iter_fasta  # re-exported (the old home of the scan)
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


# ---------------------------------------------------------------- using an index


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
