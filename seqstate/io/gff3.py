"""GFF3 writing and reading, following the Sequence Ontology GFF3 specification 1.26.

Coordinates: a :class:`Feature` is 0-based half-open (``start0`` is the first
base, ``end0`` one past the last).  In the file, columns 4 and 5 are 1-based
and closed, so a feature is written as ``start0 + 1`` and ``end0`` and read
back as ``start - 1`` and ``end``.

Escaping (specification, "Description of the Format" and "Column 1"): in every
column, tab, newline, carriage return, '%' and control characters (0x00-0x1F,
0x7F) are percent-encoded; in column 9 ';', '=', '&' and ',' are too; column 1
(seqid) encodes every character outside ``a-z A-Z 0-9 . : ^ * $ @ ! + _ ? - |``.
Encoding is RFC 3986 percent-encoding of the UTF-8 bytes with uppercase hex.
"""

from __future__ import annotations

import contextlib
import gc
import math
import re
import urllib.parse
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import BinaryIO, TextIO

from seqstate.errors import FeatureFormatError
from seqstate.io.files import display_name, iter_lines, open_input, text_lines

__all__ = [
    "GFF3_COLUMNS",
    "GTF_COLUMNS",
    "STRANDS",
    "Dialect",
    "Feature",
    "GFF3Writer",
    "comment_lines",
    "escape_column",
    "escape_column9",
    "escape_seqid",
    "iter_gff3",
    "parse_columns",
    "parse_gff3",
    "parse_sequence_regions",
    "paused_gc",
    "read_gff3",
    "read_sequence_regions",
    "unescape",
]

#: Values of column 7: plus, minus, unstranded, and '?' (stranded but unknown).
STRANDS = ("+", "-", ".", "?")
_PHASES = {"0": 0, "1": 1, "2": 2}

_CONTROL = "".join(chr(c) for c in range(0x20)) + "\x7f"
_COLUMN_ESCAPE = frozenset(_CONTROL + "%")
_COLUMN9_ESCAPE = frozenset(_CONTROL + "%;=&,")
_SEQID_SAFE = frozenset(
    "abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789.:^*$@!+_?-|"
)
_WHOLE_NUMBER = re.compile(r"[0-9]+")
#: A %-escape, and one of a byte outside ASCII (a UTF-8 sequence: decoded by urllib).
_ESCAPE = re.compile(r"%([0-9A-Fa-f]{2})")
_NON_ASCII_ESCAPE = re.compile(r"%[89A-Fa-f][0-9A-Fa-f]")


def _percent(ch: str) -> str:
    return "".join(f"%{b:02X}" for b in ch.encode("utf-8"))


def _escape(value: str, reserved: frozenset[str]) -> str:
    if not any(ch in reserved for ch in value):
        return value
    return "".join(_percent(ch) if ch in reserved else ch for ch in value)


def escape_column(value: str) -> str:
    """Escape a value for columns 2-8: tab, newline, CR, '%' and control characters."""
    return _escape(value, _COLUMN_ESCAPE)


def escape_column9(value: str) -> str:
    """Escape a column 9 tag or value.

    Encodes tab, newline, carriage return, '%', control characters
    (0x00-0x1F, 0x7F) and the reserved ``; = & ,`` as uppercase ``%XX``.
    Everything else, spaces and non-ASCII letters included, is kept as is.
    """
    return _escape(value, _COLUMN9_ESCAPE)


def escape_seqid(value: str) -> str:
    """Escape a column 1 seqid: every character outside ``[a-zA-Z0-9.:^*$@!+_?-|]``.

    The set is read as a list of literal characters (so '-' and '|' are safe);
    any other character, including space, '>' and non-ASCII letters, becomes
    the ``%XX`` codes of its UTF-8 bytes.
    """
    if all(ch in _SEQID_SAFE for ch in value):
        return value
    return "".join(ch if ch in _SEQID_SAFE else _percent(ch) for ch in value)


def unescape(value: str) -> str:
    """Decode ``%XX`` escapes (UTF-8).  A '%' not followed by two hex digits stays.

    Raises ``UnicodeDecodeError`` if the decoded bytes are not UTF-8.
    """
    if "%" not in value:
        return value
    if _NON_ASCII_ESCAPE.search(value) is None:  # the common case, such as %2C or %3B
        return _ESCAPE.sub(_ascii_of_escape, value)
    return urllib.parse.unquote(value, encoding="utf-8", errors="strict")


def _ascii_of_escape(match: re.Match[str]) -> str:
    return chr(int(match.group(1), 16))


@dataclass
class Feature:
    """One GFF3 feature line, 0-based half-open (``start0 < end0``).

    ``strand`` is '+', '-', '.' or '?'; ``phase`` is 0, 1, 2 or None ('.').
    ``attributes`` is an ordered list of ``(tag, value)``; a value is a string
    or, for a multi-valued tag such as Parent, a list of strings.  Values are
    kept unescaped here and escaped on writing.  ``line0`` is the 0-based line
    the feature was read from (None for features made by the program).
    """

    seqid: str
    source: str
    type: str
    start0: int
    end0: int
    score: float | None
    strand: str
    phase: int | None
    attributes: list[tuple[str, str | list[str]]] = field(default_factory=list)
    line0: int | None = None

    def values(self, tag: str) -> list[str]:
        """All values of ``tag`` as a list (empty if the tag is absent)."""
        out: list[str] = []
        for key, value in self.attributes:
            if key == tag:
                out.extend([value] if isinstance(value, str) else value)
        return out

    def get(self, tag: str) -> str | None:
        """The first value of ``tag``, or None if the tag is absent."""
        found = self.values(tag)
        return found[0] if found else None


# ---------------------------------------------------------------- writing


def _format_attributes(attributes: list[tuple[str, str | list[str]]]) -> str:
    if not attributes:
        return "."
    parts = []
    for key, value in attributes:
        if not key:
            raise ValueError("attribute tag must not be empty")
        if isinstance(value, str):
            text = escape_column9(value)
        else:
            if not value:
                raise ValueError(f"attribute {key!r} has an empty list of values")
            text = ",".join(escape_column9(v) for v in value)
        parts.append(f"{escape_column9(key)}={text}")
    return ";".join(parts)


def header_text(sequence_regions: Sequence[tuple[str, int] | tuple[str, int, int]]) -> str:
    """``##gff-version 3`` and one ``##sequence-region`` line per item (see
    :meth:`GFF3Writer.header`), as one string."""
    lines = ["##gff-version 3\n"]
    for item in sequence_regions:
        if len(item) == 2:
            seqid, start, end = item[0], 1, item[1]
        else:
            seqid, start, end = item
        if not 1 <= start <= end:
            raise ValueError(
                f"sequence region {seqid!r} {start}-{end} is not 1-based with 1 <= start <= end"
            )
        lines.append(f"##sequence-region {escape_seqid(seqid)} {start} {end}\n")
    return "".join(lines)


def comment_lines(items: Sequence[tuple[str, str]]) -> str:
    """``# KEY VALUE`` lines, one per item, as one string (the run's provenance).

    GFF3 1.26 reads a line that starts with a single ``#`` as a comment, allowed
    anywhere after the ``##gff-version 3`` line; annotate writes these after the
    ``##sequence-region`` lines, before the first feature.  Values are escaped as
    columns are (tab, newline, '%' and control characters percent-encoded), so each
    item stays one line; a key is one word.
    """
    out = []
    for key, value in items:
        if not key or any(ch.isspace() or ch in _COLUMN_ESCAPE for ch in key):
            raise ValueError(f"comment key {key!r} is not one word")
        out.append(f"# {key} {escape_column(value)}\n")
    return "".join(out)


class GFF3Writer:
    """Write GFF3 lines to a text handle.

    Call :meth:`header` once first, then :meth:`write` for each feature.  The
    score is formatted with ``score_format`` (default ``"{:.4f}"``); attribute
    values must already be strings (the caller formats numbers).
    """

    def __init__(
        self, handle: TextIO, score_format: str = "{:.4f}", *, body_only: bool = False
    ) -> None:
        """``body_only``: write feature lines only (no ``##gff-version`` line), for a part
        of a file whose header is written elsewhere (see :func:`header_text`)."""
        self._handle = handle
        self._score_format = score_format
        self._started = body_only

    def header(self, sequence_regions: Sequence[tuple[str, int] | tuple[str, int, int]]) -> None:
        """Write ``##gff-version 3`` then one ``##sequence-region`` line per record.

        Each item is ``(seqid, length)``, written ``##sequence-region seqid 1
        length``, or ``(seqid, start, end)`` in 1-based closed coordinates for
        a part of a record.  Items are written in the order given.
        """
        if self._started:
            raise RuntimeError("GFF3Writer.header() must be called before any feature")
        self._started = True
        self._handle.write(header_text(sequence_regions))

    def format_score(self, score: float | None) -> str:
        """Column 6 text for ``score``: '.' for None, else ``score_format``."""
        if score is None:
            return "."
        if not math.isfinite(score):
            raise ValueError(f"score {score!r} is not a finite number")
        text = self._score_format.format(score)
        if text.startswith("-"):
            try:
                is_zero = float(text) == 0.0
            except ValueError:
                is_zero = False
            if is_zero:
                # "-0.0000" (a tiny negative rounded to zero) is written as "0.0000".
                text = text[1:]
        return text

    def write(self, feature: Feature) -> None:
        """Write one feature line (1-based closed: ``start0 + 1`` to ``end0``)."""
        if not self._started:
            self._handle.write("##gff-version 3\n")
            self._started = True
        if not (0 <= feature.start0 < feature.end0):
            raise ValueError(
                f"feature {feature.start0}-{feature.end0} is not a 0-based half-open "
                "interval with 0 <= start0 < end0"
            )
        if feature.strand not in STRANDS:
            raise ValueError(f"strand {feature.strand!r} is not one of {' '.join(STRANDS)}")
        if feature.phase not in (None, 0, 1, 2):
            raise ValueError(f"phase {feature.phase!r} is not 0, 1, 2 or None")
        if not feature.seqid:
            raise ValueError("seqid must not be empty")
        columns = [
            escape_seqid(feature.seqid),
            escape_column(feature.source) or ".",
            escape_column(feature.type),
            str(feature.start0 + 1),
            str(feature.end0),
            self.format_score(feature.score),
            feature.strand,
            "." if feature.phase is None else str(feature.phase),
            _format_attributes(feature.attributes),
        ]
        if not columns[2]:
            raise ValueError("feature type must not be empty")
        self._handle.write("\t".join(columns) + "\n")

    def write_all(self, features: Iterable[Feature]) -> None:
        """Write every feature of ``features`` in order."""
        for feature in features:
            self.write(feature)

    def close(self) -> None:
        """Flush the handle (the caller owns and closes it)."""
        self._handle.flush()


# ---------------------------------------------------------------- reading


def _error(message: str, shown: str, line0: int) -> FeatureFormatError:
    return FeatureFormatError(message, path=shown, line0=line0)


def _unescape_field(text: str, what: str, shown: str, line0: int) -> str:
    try:
        return unescape(text)
    except UnicodeDecodeError:
        raise _error(
            f"{what} {text!r} has %-escapes that do not decode as UTF-8", shown, line0
        ) from None


def _parse_position(
    text: str, column: int, name: str, shown: str, line0: int, fmt: str = "GFF3"
) -> int:
    if not _WHOLE_NUMBER.fullmatch(text):
        raise _error(f"column {column} ({name}) {text!r} is not a whole number", shown, line0)
    value = int(text)
    if value < 1:
        raise _error(
            f"column {column} ({name}) is {value}; {fmt} positions are 1-based, expected >= 1",
            shown,
            line0,
        )
    return value


def _parse_attributes(text: str, shown: str, line0: int) -> list[tuple[str, str | list[str]]]:
    """Column 9 as ``(tag, value)`` pairs in order; a value with ',' is a list.

    The hot path of reading large annotations (tens of attributes per line on
    RefSeq files): a piece without '%' is split without decoding escapes."""
    if text in ("", "."):
        return []
    escaped = "%" in text
    out: list[tuple[str, str | list[str]]] = []
    for piece in text.split(";"):
        key, eq, raw_value = piece.partition("=")
        if not eq:
            if not piece.strip():
                continue  # a trailing or doubled ';'
            raise _error(
                f"column 9 attribute {piece!r} has no '=' (expected tag=value)", shown, line0
            )
        key = key.strip()
        if not key:
            raise _error(
                f"column 9 attribute {piece!r} has an empty tag (expected tag=value)",
                shown,
                line0,
            )
        if escaped and "%" in piece:
            tag = _unescape_field(key, "column 9 tag", shown, line0)
            values = [
                _unescape_field(v, "column 9 value", shown, line0) for v in raw_value.split(",")
            ]
            out.append((tag, values[0] if len(values) == 1 else values))
        elif "," in raw_value:
            out.append((key, raw_value.split(",")))
        else:
            out.append((key, raw_value))
    return out


def iter_gff3(path: str | Path, *, types: set[str] | None = None) -> Iterator[Feature]:
    """Yield the features of a GFF3 file, converted to 0-based half-open.

    ``path`` is a file name or ``"-"``; plain or gzip.  See :func:`parse_gff3`.
    """
    with open_input(path, FeatureFormatError, "GFF3") as handle:
        yield from parse_gff3(handle, display_name(path), types=types)


def parse_gff3(handle: BinaryIO, shown: str, *, types: set[str] | None = None) -> Iterator[Feature]:
    """The features of an open binary ``handle``, named ``shown`` in messages.

    Blank lines, comments and directives are skipped; reading stops at
    ``##FASTA`` or at a line starting with '>' (an implied ``##FASTA``, as the
    specification allows).  With ``types``, only features whose column 3 is in
    the set are returned.  Raises :class:`~seqstate.errors.FeatureFormatError`
    naming the file and line for a wrong column count, a start or end that is
    not a whole number >= 1, start > end, a bad score, strand or phase, or a
    column 9 piece without '='.
    """
    for line0, line in text_lines(handle, shown, FeatureFormatError):
        if not line.strip():
            continue
        if line.startswith("##FASTA") or line.startswith(">"):
            return
        if line.startswith("#"):
            continue
        feature = _parse_line(line, shown, line0)
        if types is None or feature.type in types:
            yield feature


@dataclass(frozen=True)
class Dialect:
    """How columns 1-8 of a GFF-like line are named and checked: GFF3, or GTF.

    ``name`` is used in messages; ``seqid``, ``type`` and ``phase`` are what
    columns 1, 3 and 8 are called; ``strands`` the values of column 7;
    ``escaped`` whether %-escapes are decoded (GFF3) or the text kept (GTF).
    """

    name: str
    seqid: str
    type: str
    phase: str
    strands: tuple[str, ...]
    escaped: bool


#: GFF3 (Sequence Ontology specification 1.26) columns 1-8.
GFF3_COLUMNS = Dialect("GFF3", "seqid", "type", "phase", STRANDS, True)
#: GTF 2.2 columns 1-8: the same layout, named seqname, feature and frame; no '?'.
GTF_COLUMNS = Dialect("GTF", "seqname", "feature", "frame", ("+", "-", "."), False)


def parse_columns(
    cols: Sequence[str], shown: str, line0: int, dialect: Dialect = GFF3_COLUMNS
) -> tuple[str, str, str, int, int, float | None, str, int | None]:
    """Columns 1-8 of a GFF3 or GTF line, checked: ``(seqid, source, type, start0,
    end0, score, strand, phase)``, 0-based half-open.  Raises
    :class:`~seqstate.errors.FeatureFormatError` naming the file and line."""
    d = dialect

    def text(i: int, name: str) -> str:
        return (
            _unescape_field(cols[i], f"column {i + 1} ({name})", shown, line0)
            if d.escaped
            else cols[i]
        )

    seqid = text(0, d.seqid)
    if not seqid or seqid == ".":
        raise _error(f"column 1 ({d.seqid}) {cols[0]!r} is empty", shown, line0)
    source = text(1, "source")
    ftype = text(2, d.type)
    if not ftype or ftype == ".":
        raise _error(f"column 3 ({d.type}) {cols[2]!r} is empty", shown, line0)
    start = _parse_position(cols[3], 4, "start", shown, line0, d.name)
    end = _parse_position(cols[4], 5, "end", shown, line0, d.name)
    if start > end:
        raise _error(
            f"start {start} is greater than end {end} "
            f"({d.name} positions are 1-based inclusive with start <= end)",
            shown,
            line0,
        )
    score: float | None = None
    if cols[5] != ".":
        try:
            score = float(cols[5])
        except ValueError:
            score = math.nan
        if not math.isfinite(score):
            raise _error(f"column 6 (score) {cols[5]!r} is not a number or '.'", shown, line0)
    strand = cols[6]
    if strand not in d.strands:
        raise _error(
            f"column 7 (strand) {strand!r} is not one of {' '.join(d.strands)}", shown, line0
        )
    if cols[7] == ".":
        phase = None
    elif cols[7] in _PHASES:
        phase = _PHASES[cols[7]]
    else:
        raise _error(f"column 8 ({d.phase}) {cols[7]!r} is not one of 0 1 2 .", shown, line0)
    return seqid, source, ftype, start - 1, end, score, strand, phase


def _parse_line(line: str, shown: str, line0: int) -> Feature:
    cols = line.split("\t")
    if len(cols) != 9:
        hint = ""
        if len(cols) < 9 and len(line.split()) >= 9:
            hint = " (columns must be separated by tabs, not spaces)"
        raise _error(f"found {len(cols)} tab-separated columns, expected 9{hint}", shown, line0)
    seqid, source, ftype, start, end, score, strand, phase = parse_columns(cols, shown, line0)
    return Feature(
        seqid=seqid,
        source=source,
        type=ftype,
        start0=start,
        end0=end,
        score=score,
        strand=strand,
        phase=phase,
        attributes=_parse_attributes(cols[8], shown, line0),
        line0=line0,
    )


@contextlib.contextmanager
def paused_gc() -> Iterator[None]:
    """The cyclic garbage collector paused while a whole annotation is read.

    Reading makes millions of small objects (strings, tuples, lists) that form
    no reference cycles; the collector's passes over them cost about 40 % of the
    reading time of a RefSeq chromosome (measured on A. thaliana chromosome 1).
    Reference counting still frees everything; the collector is switched back on
    afterwards if it was on."""
    was_on = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if was_on:
            gc.enable()


def read_gff3(path: str | Path, *, types: set[str] | None = None) -> list[Feature]:
    """Read every feature of a GFF3 file; see :func:`iter_gff3`."""
    with paused_gc():
        return list(iter_gff3(path, types=types))


# ---------------------------------------------------------------- directives


def read_sequence_regions(path: str | Path) -> dict[str, tuple[int, int, int]]:
    """The ``##sequence-region`` lines of a GFF3 file; see :func:`parse_sequence_regions`."""
    with open_input(path, FeatureFormatError, "GFF3") as handle:
        return parse_sequence_regions(handle, display_name(path))


def parse_sequence_regions(handle: BinaryIO, shown: str) -> dict[str, tuple[int, int, int]]:
    """The ``##sequence-region seqid start end`` lines of an open GFF3 ``handle``.

    Returns ``{seqid: (start0, end0, line0)}`` (0-based half-open; ``line0``
    the 0-based line), in file order.  Reading stops at ``##FASTA`` or a line
    starting with '>'.  Raises :class:`~seqstate.errors.FeatureFormatError`
    naming the file (``shown``) and line for a malformed line or a seqid given
    twice with different bounds.
    """
    out: dict[str, tuple[int, int, int]] = {}
    for line0, raw in iter_lines(handle, shown, FeatureFormatError):
        if raw.startswith(b"##FASTA") or raw.startswith(b">"):
            break
        if not raw.startswith(b"##sequence-region"):
            continue
        text = raw.decode("utf-8", errors="replace")
        fields = text.split()
        numbers = fields[2:4] if len(fields) == 4 else []
        if (
            fields[0] != "##sequence-region"
            or not all(n.isdigit() for n in numbers)
            or (len(numbers) != 2 or not 1 <= int(numbers[0]) <= int(numbers[1]))
        ):
            raise FeatureFormatError(
                f"{text.strip()!r}: expected '##sequence-region SEQID START END' with "
                "1-based START <= END",
                path=shown,
                line0=line0,
            )
        try:
            seqid = unescape(fields[1])
        except UnicodeDecodeError:
            raise FeatureFormatError(
                f"seqid {fields[1]!r} has %-escapes that do not decode as UTF-8",
                path=shown,
                line0=line0,
            ) from None
        bounds = (int(numbers[0]) - 1, int(numbers[1]))
        if seqid in out and out[seqid][:2] != bounds:
            first = out[seqid]
            raise FeatureFormatError(
                f"##sequence-region {seqid} {bounds[0] + 1} {bounds[1]} differs from "
                f"line {first[2] + 1} ({first[0] + 1} {first[1]})",
                path=shown,
                line0=line0,
            )
        out.setdefault(seqid, (*bounds, line0))
    return out
