"""One reader for interval files: BED, GFF3 and GTF, into one record type.

Every :class:`Interval` is 0-based half-open whatever the file's convention:
BED columns 2 and 3 are kept as written (0-based half-open); GFF3 and GTF
columns 4 and 5 (1-based closed) are read as ``start - 1`` and ``end``.

GTF is read as the GTF 2.2 specification describes it: nine tab-separated
columns ``seqname source feature start end score strand frame attributes``,
where the attributes are ``key "value";`` pairs separated by ``;`` (a value
may also be written without quotes, such as a number), and a ``#`` outside a
quoted value starts a comment that runs to the end of the line.  Column 8 (the
frame) takes the place of GFF3's phase.  The attributes ``gene_id`` and
``transcript_id`` that the specification asks for are not required here (a
``gene`` line of common annotation files has no ``transcript_id``).

Formats are told apart by :func:`sniff_interval_format`: by the file name, else
by the first lines of the content.

Gene annotations: :func:`read_gene_features` reads GFF3 or GTF into GFF3-style
features with the gene -> mRNA -> CDS/exon hierarchy (``ID`` and ``Parent``), so
every command that needs genes reads either format; :func:`gtf_gene_features`
builds that hierarchy from GTF's ``gene_id`` and ``transcript_id``.
"""

from __future__ import annotations

import os
import re
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import BinaryIO, cast

from seqstate.errors import FeatureFormatError, UsageError
from seqstate.io.bed import parse_bed
from seqstate.io.files import display_name, open_input, peek_lines, text_lines
from seqstate.io.gff3 import (
    GTF_COLUMNS,
    STRANDS,
    Feature,
    parse_columns,
    parse_gff3,
    paused_gc,
    read_gff3,
)

__all__ = [
    "FORMAT_NAMES",
    "INTERVAL_FORMATS",
    "SNIFF_LINES",
    "Interval",
    "detect_interval_format",
    "format_by_name",
    "gtf_gene_features",
    "parse_gtf",
    "parse_gtf_attributes",
    "read_gene_features",
    "read_interval_file",
    "read_intervals",
    "sniff_file",
    "sniff_interval_format",
]

#: The interval formats read, by the name used for them in options and messages.
INTERVAL_FORMATS = ("bed", "gff3", "gtf")
#: How each format is named in messages.
FORMAT_NAMES = {"bed": "BED", "gff3": "GFF3", "gtf": "GTF"}
#: At most this many first lines are read to tell the format from the content.
SNIFF_LINES = 1000

_NAME_ENDINGS = ((".bed", "bed"), (".gff3", "gff3"), (".gff", "gff3"), (".gtf", "gtf"))
#: A GTF attribute column starts ``key "value"`` or ``key value;`` (no '=').
_GTF_START = re.compile(r'\s*[A-Za-z_][A-Za-z0-9_.\-]*\s+("|[^\s=;"]+\s*(;|$))')


@dataclass(frozen=True)
class Interval:
    """One interval of a BED, GFF3 or GTF file: bases ``start0 .. end0 - 1`` of ``seqid``.

    ``strand`` is '+', '-', '.' or '?' (GFF3 only); a BED line without column 6
    has '.'.  ``type`` is column 3 of GFF3 and GTF (None for BED).  ``name`` is
    BED column 4 as written, the GFF3 ``ID`` (else ``Name``) attribute, or the
    GTF ``transcript_id`` (else ``gene_id``); None when there is none.
    ``phase`` is the GFF3 phase or GTF frame (0, 1, 2) or None.  ``attributes``
    are the GFF3 or GTF attributes in file order, ``(key, value)`` with a value
    that is a string or (GFF3, a tag with several values) a list of strings.
    ``line0`` is the 0-based line of the file, ``source`` column 2 (None for BED).
    """

    seqid: str
    start0: int
    end0: int
    strand: str
    type: str | None
    name: str | None
    phase: int | None
    line0: int
    attributes: list[tuple[str, str | list[str]]] = field(default_factory=list)
    source: str | None = None

    def get(self, key: str) -> str | None:
        """The first value of attribute ``key``, or None when it is absent."""
        for k, value in self.attributes:
            if k == key:
                return value if isinstance(value, str) else value[0]
        return None


# ---------------------------------------------------------------- telling the format


def format_by_name(path: str | os.PathLike[str]) -> str | None:
    """``bed``, ``gff3`` or ``gtf`` from a name ending ``.bed``, ``.gff3``, ``.gff`` or
    ``.gtf``, optionally followed by ``.gz`` or ``.bgz`` (any case); else None."""
    name = Path(str(path)).name.lower()
    name = re.sub(r"\.(gz|bgz)$", "", name)
    for ending, fmt in _NAME_ENDINGS:
        if name.endswith(ending):
            return fmt
    return None


def _looks_gtf(attributes: str) -> bool:
    return "=" not in attributes.split('"', 1)[0] and _GTF_START.match(attributes) is not None


def detect_interval_format(lines: Sequence[bytes]) -> str:
    """``gff3``, ``gtf`` or ``bed`` from the first lines of a file (decompressed bytes).

    A ``##gff-version 2`` or ``#gtf-version`` line (the first line of NCBI and
    Ensembl GTF files) means GTF, any other ``##gff-version`` line GFF3.
    Otherwise the first line that is neither blank nor a ``#`` comment decides:
    nine (GTF: also ten, the last a ``#`` comment) tab-separated columns whose
    4th and 5th are whole numbers, 7th a strand and 8th a phase mean GTF when
    column 9 reads ``key "value"`` (or ``key value;``, without '='), else GFF3.
    Anything else (``track``/``browser`` lines, BED columns, an empty file) is BED.
    """
    for raw in lines:
        line = raw.decode("utf-8", errors="replace").rstrip("\r\n")
        if not line.strip():
            continue
        if line.startswith("##gff-version"):
            version = line[len("##gff-version") :].strip()
            return "gtf" if version.split(".")[0] == "2" else "gff3"
        if line.startswith("#gtf-version"):
            return "gtf"
        if line.startswith("#"):
            continue
        cols = line.split("\t")
        if (
            len(cols) in (9, 10)
            and cols[3].isdigit()
            and cols[4].isdigit()
            and cols[6] in STRANDS
            and cols[7] in ("0", "1", "2", ".")
        ):
            if _looks_gtf(cols[8]):
                return "gtf"
            if len(cols) == 9:
                return "gff3"
        return "bed"
    return "bed"


def sniff_interval_format(name: str | Path | None, first_lines: Sequence[bytes]) -> str:
    """The format of an interval file: by ``name`` (:func:`format_by_name`, not for
    standard input ``-`` or None), else by its ``first_lines``
    (:func:`detect_interval_format`)."""
    by_name = format_by_name(name) if name is not None and str(name) != "-" else None
    return by_name or detect_interval_format(first_lines)


def sniff_file(path: str | os.PathLike[str], what: str = "BED, GFF3 or GTF") -> str:
    """The format of the file ``path``: by its name, else by its first lines (the
    file is opened for them).  ``what`` names the expected formats in the message
    for a file that cannot be opened.  Not for standard input, which is read once
    by :func:`read_interval_file`."""
    by_name = format_by_name(path)
    if by_name is not None:
        return by_name
    shown = display_name(path)
    with open_input(path, FeatureFormatError, what) as handle:
        head, _ = peek_lines(handle, shown, FeatureFormatError, most=SNIFF_LINES)
    return detect_interval_format(head)


# ---------------------------------------------------------------- reading


def read_intervals(
    handle: BinaryIO, fmt: str, shown: str, *, types: set[str] | None = None
) -> Iterator[Interval]:
    """The intervals of an open binary ``handle`` in format ``fmt``, in file order.

    ``shown`` names the file in messages.  ``types`` keeps only GFF3 and GTF
    features of those column-3 types (ignored for BED).  Malformed lines raise
    :class:`~seqstate.errors.FeatureFormatError` naming the file and line
    (:func:`~seqstate.io.bed.parse_bed`, :func:`~seqstate.io.gff3.parse_gff3`,
    :func:`parse_gtf`).
    """
    if fmt == "bed":
        for b in parse_bed(handle, shown):
            yield Interval(b.seqid, b.start0, b.end0, b.strand or ".", None, b.name, None, b.line0)
    elif fmt == "gff3":
        for f in parse_gff3(handle, shown, types=types):
            yield Interval(
                f.seqid,
                f.start0,
                f.end0,
                f.strand,
                f.type,
                f.get("ID") or f.get("Name"),
                f.phase,
                f.line0 if f.line0 is not None else -1,
                list(f.attributes),
                f.source,
            )
    elif fmt == "gtf":
        yield from parse_gtf(handle, shown, types=types)
    else:
        raise UsageError(f"interval format {fmt!r} is not one of {', '.join(INTERVAL_FORMATS)}")


def read_interval_file(
    path: str | os.PathLike[str],
    fmt: str | None = None,
    *,
    types: set[str] | None = None,
    what: str = "BED, GFF3 or GTF",
) -> tuple[str, list[Interval]]:
    """Read a BED, GFF3 or GTF file (plain or gzip; ``"-"`` for standard input).

    ``fmt`` is ``bed``, ``gff3``, ``gtf`` or None (told by the name, else by the
    first lines: :func:`sniff_interval_format`; standard input is read once).
    ``what`` names the expected formats in the message for a file that cannot
    be opened when the name does not tell the format.  Returns the format read
    and the intervals (see :func:`read_intervals`).
    """
    if fmt is not None and fmt not in INTERVAL_FORMATS:
        raise UsageError(f"interval format {fmt!r} is not one of {', '.join(INTERVAL_FORMATS)}")
    shown = display_name(path)
    known = fmt or (format_by_name(path) if str(path) != "-" else None)
    with open_input(path, FeatureFormatError, FORMAT_NAMES[known] if known else what) as handle:
        if known is None:
            head, handle = peek_lines(handle, shown, FeatureFormatError, most=SNIFF_LINES)
            known = detect_interval_format(head)
        with paused_gc():
            return known, list(read_intervals(handle, known, shown, types=types))


# ---------------------------------------------------------------- GTF


def _error(message: str, shown: str, line0: int) -> FeatureFormatError:
    return FeatureFormatError(message, path=shown, line0=line0)


def _split_comment(text: str) -> str:
    """``text`` up to a ``#`` that is outside double quotes (a GTF comment)."""
    if "#" not in text:
        return text
    quoted = False
    for i, ch in enumerate(text):
        if ch == '"':
            quoted = not quoted
        elif ch == "#" and not quoted:
            return text[:i]
    return text


#: One well-formed GTF attribute: ``key "value";`` or ``key value;`` (the ';' may
#: be left off at the end of the column), with the blanks and ';' that follow it.
#: Keys and unquoted values hold no blank, quote or ';', so a column splits into
#: pairs one way only, and a column that does not match fails in linear time (no
#: two parts of the pattern can take the same character).
_GTF_PAIR_TEXT = r'{k}[ \t]+(?:"{q}"|{u})(?:[ \t]*;[ \t;]*|[ \t]*$)'
#: The (key, value) groups of one pair of a column that matched :data:`_GTF_COLUMN`:
#: the value is what lies between the quotes, or the unquoted word (in such a column
#: no quote follows an unquoted word), so that ``findall`` gives the pairs at once.
_GTF_PAIR = re.compile(r'([^\s";]+)[ \t]+"?((?<=")[^"]*(?=")|(?<!")[^\s";]+)"?')
#: A whole column of well-formed attributes.
_GTF_COLUMN = re.compile(
    r"[ \t;]*(?:" + _GTF_PAIR_TEXT.format(k=r'[^\s";]+', q=r'[^"]*', u=r'[^\s";]+') + ")*"
)


def parse_gtf_attributes(text: str, shown: str = "", line0: int = 0) -> list[tuple[str, str]]:
    """The ``key "value";`` pairs of a GTF column 9, in order; a key given twice
    (``tag "a"; tag "b";``) gives two pairs.  Quotes are removed from a quoted
    value (which may hold spaces and ';'; an empty ``""`` is kept as ``""``); an
    unquoted value (``exon_number 2;``) is kept as written.  A trailing ``; `` and
    doubled ';' are allowed.  Raises :class:`~seqstate.errors.FeatureFormatError`
    for a pair without a value or with an unclosed quote.

    A well-formed column (every line of database files) is checked whole and split
    by regular expressions (the pairs of such a column are unique: keys and
    unquoted values hold no blank, quote or ';'); any other column is read by
    :func:`_parse_gtf_attributes_slowly`, which names what is wrong."""
    if text in ("", "."):
        return []
    if _GTF_COLUMN.fullmatch(text) is None:
        return _parse_gtf_attributes_slowly(text, shown, line0)
    return _GTF_PAIR.findall(text)


def _parse_gtf_attributes_slowly(text: str, shown: str, line0: int) -> list[tuple[str, str]]:
    """:func:`parse_gtf_attributes` one pair at a time, with a message for the
    first pair that is not ``key "value";``."""
    out: list[tuple[str, str]] = []
    rest = text.strip()
    if rest == ".":
        return out
    while rest:
        if rest.startswith(";"):
            rest = rest[1:].lstrip()
            continue
        parts = rest.split(None, 1)
        key = parts[0]
        after = parts[1].lstrip() if len(parts) > 1 else ""
        if key.endswith(";") or not after or after.startswith(";"):
            raise _error(
                f'column 9 attribute {key.rstrip(";")!r} has no value (expected key "value";)',
                shown,
                line0,
            )
        if after.startswith('"'):
            close = after.find('"', 1)
            if close < 0:
                raise _error(
                    f"column 9 attribute {key!r} has a value with no closing '\"'", shown, line0
                )
            value = after[1:close]
            rest = after[close + 1 :].lstrip()
        else:
            value, _, rest = after.partition(";")
            value = value.strip()
            rest = ";" + rest
            if " " in value:
                raise _error(
                    f"column 9 attribute {key!r} value {value!r} has spaces but no quotes "
                    '(expected key "value";)',
                    shown,
                    line0,
                )
        if rest and not rest.startswith(";"):
            raise _error(
                f"column 9 attribute {key!r} is not followed by ';' (expected key \"value\";)",
                shown,
                line0,
            )
        out.append((key, value))
    return out


def _gtf_line(line: str, shown: str, line0: int) -> Interval:
    cols = line.split("\t")
    if len(cols) == 10 and cols[9].lstrip().startswith("#"):
        cols = cols[:9]
    if len(cols) not in (8, 9):
        hint = ""
        if len(cols) < 8 and len(line.split()) >= 8:
            hint = " (columns must be separated by tabs, not spaces)"
        raise _error(f"found {len(cols)} tab-separated columns, expected 9{hint}", shown, line0)
    seqid, source, ftype, start0, end0, _, strand, phase = parse_columns(
        cols, shown, line0, GTF_COLUMNS
    )
    pairs = parse_gtf_attributes(_split_comment(cols[8]), shown, line0) if len(cols) == 9 else []
    attributes = cast("list[tuple[str, str | list[str]]]", pairs)  # GTF values are strings
    values = dict(reversed(pairs))  # the first value of each key
    name = values.get("transcript_id") or values.get("gene_id")
    return Interval(seqid, start0, end0, strand, ftype, name, phase, line0, attributes, source)


def parse_gtf(handle: BinaryIO, shown: str, *, types: set[str] | None = None) -> Iterator[Interval]:
    """The features of an open GTF ``handle``, 0-based half-open, in file order.

    Blank lines and lines starting with ``#`` are skipped.  With ``types``,
    only features whose column 3 is in the set are returned.  Raises
    :class:`~seqstate.errors.FeatureFormatError` naming the file (``shown``)
    and line for a wrong column count, a start or end that is not a whole
    number >= 1, start > end, a bad score, strand or frame, or a malformed
    attribute.
    """
    for line0, line in text_lines(handle, shown, FeatureFormatError):
        if not line.strip() or line.startswith("#"):
            continue
        interval = _gtf_line(line, shown, line0)
        if types is None or interval.type in types:
            yield interval


# ---------------------------------------------------------------- GTF as a gene hierarchy

#: GTF types that belong to a transcript (they get ``Parent=transcript_id``).
GTF_TRANSCRIPT_PARTS = frozenset(
    {
        "CDS",
        "exon",
        "start_codon",
        "stop_codon",
        "5UTR",
        "3UTR",
        "UTR",
        "five_prime_utr",
        "three_prime_utr",
        "Selenocysteine",
    }
)
#: GTF lines that only describe a gene or transcript as a whole (replaced by the
#: gene and mRNA/transcript lines built from the parts).
GTF_WHOLE_TYPES = frozenset({"gene", "transcript", "mRNA"})
#: Attributes that name a gene's kind: NCBI and Ensembl ``gene_biotype``, GENCODE
#: ``gene_type``.  A value that ends ``pseudogene`` (``pseudogene``,
#: ``processed_pseudogene``, ``transcribed_unprocessed_pseudogene``, ...) makes the
#: gene a ``pseudogene`` feature, the SO term RefSeq and Ensembl GFF3 use for it.
GTF_BIOTYPE_KEYS = ("gene_biotype", "gene_type")
#: Attributes of GTF lines that the hierarchy replaces by ``ID`` and ``Parent``.
_GTF_ID_KEYS = frozenset({"gene_id", "transcript_id", "ID", "Parent"})


def _gtf_id(iv: Interval, key: str) -> str | None:
    """The value of ``gene_id`` or ``transcript_id``; an empty value (``""``, which
    NCBI writes on gene lines, and GTF 2.2 on intergenic lines) is none."""
    value = iv.get(key)
    return value or None


def _own_attributes(iv: Interval) -> list[tuple[str, str | list[str]]]:
    return [(k, v) for k, v in iv.attributes if k not in _GTF_ID_KEYS]


def _gene_type(lines: Sequence[Interval]) -> str:
    for iv in lines:
        for key in GTF_BIOTYPE_KEYS:
            biotype = iv.get(key)
            if biotype is not None:
                return "pseudogene" if biotype.endswith("pseudogene") else "gene"
    return "gene"


def _feature(iv: Interval, ftype: str, attributes: list[tuple[str, str | list[str]]]) -> Feature:
    return Feature(
        iv.seqid,
        iv.source or ".",
        ftype,
        iv.start0,
        iv.end0,
        None,
        iv.strand,
        iv.phase,
        attributes,
        iv.line0,
    )


def _with_stops(cds: list[Interval], stops: list[Interval], strand: str) -> list[Interval]:
    """CDS lines with the stop codon joined to them (GTF 2.2 leaves the stop codon out
    of CDS, GFF3 keeps it in).  A stop piece touching a CDS piece extends it (on
    ``-`` the 3' end is the start, so the phase does not change); one touching none
    becomes a CDS piece of its own, with the phase its 5' position gives."""
    pieces = sorted(cds, key=lambda iv: iv.start0)
    for stop in sorted(stops, key=lambda iv: iv.start0):
        if any(p.start0 <= stop.start0 and stop.end0 <= p.end0 for p in pieces):
            continue  # already inside a CDS line (a file that keeps stops in CDS)
        for k, p in enumerate(pieces):
            if p.end0 == stop.start0 and strand != "-":
                pieces[k] = replace_interval(p, end0=stop.end0)
                break
            if p.start0 == stop.end0 and strand == "-":
                pieces[k] = replace_interval(p, start0=stop.start0)
                break
        else:
            pieces.append(replace_interval(stop, type="CDS", phase=None))
    pieces.sort(key=lambda iv: iv.start0)
    order = pieces if strand != "-" else pieces[::-1]
    done, out = 0, []
    for p in order:
        if p.phase is None:
            p = replace_interval(p, phase=(3 - done % 3) % 3)
        out.append(p)
        done += p.end0 - p.start0
    return sorted(out, key=lambda iv: iv.start0)


def replace_interval(iv: Interval, **changes: object) -> Interval:
    """A copy of ``iv`` with some fields changed."""
    from dataclasses import replace

    return replace(iv, **changes)  # type: ignore[arg-type]


def gtf_gene_features(
    intervals: Sequence[Interval], shown: str, *, join_stop_codons: bool = True
) -> list[Feature]:
    """GTF lines as GFF3-style features with a gene -> transcript -> part hierarchy.

    Every ``gene_id`` gives a ``gene`` feature (``ID=gene_id``; a ``pseudogene``
    when its ``gene_biotype`` or ``gene_type`` ends ``pseudogene``) and every
    ``transcript_id`` an ``mRNA`` (when it has CDS lines, else ``transcript``)
    feature (``ID=transcript_id;Parent=gene_id``); each spans all the lines of its
    gene or transcript (the file's own ``gene``/``transcript`` lines included, and
    then dropped; their other attributes are kept).  An empty ``gene_id`` or
    ``transcript_id`` (``""``: NCBI's gene lines) is read as absent.  The
    transcript's parts (CDS, exon, codons, UTRs, Selenocysteine; any line with a
    ``transcript_id``) get ``Parent=transcript_id``, their other attributes kept; a
    part with a ``gene_id`` and no ``transcript_id`` gets ``Parent=gene_id``.
    With ``join_stop_codons`` the ``stop_codon`` lines are joined to the CDS (GTF 2.2
    leaves the stop codon out of CDS; GFF3 and this program keep it in).  A line
    without ``gene_id`` or ``transcript_id`` that is not a gene or transcript line is
    kept as it is, without a parent.  Features come gene by gene in the order genes
    first appear, each gene's transcripts in order, parts by start.

    Raises :class:`~seqstate.errors.FeatureFormatError` naming the line for a part
    without ``gene_id``, and for a gene or transcript whose lines lie on different
    seqids or strands.
    """
    genes: dict[str, list[Interval]] = {}
    tx_of_gene: dict[str, dict[str, list[Interval]]] = {}
    loose: list[Interval] = []
    lone: dict[str, list[Interval]] = {}  # parts with a gene_id and no transcript_id
    for iv in intervals:
        gid, tid = _gtf_id(iv, "gene_id"), _gtf_id(iv, "transcript_id")
        if gid is not None and tid is None and iv.type not in GTF_WHOLE_TYPES:
            lone.setdefault(gid, []).append(iv)
        if gid is None:
            if tid is not None or iv.type in GTF_TRANSCRIPT_PARTS:
                raise _error(
                    f"GTF {iv.type} line has no gene_id attribute (GTF 2.2 asks for "
                    'gene_id "..." on every line)',
                    shown,
                    iv.line0,
                )
            loose.append(iv)
            continue
        genes.setdefault(gid, []).append(iv)
        if tid is not None:
            tx_of_gene.setdefault(gid, {}).setdefault(tid, []).append(iv)
    out: list[Feature] = []
    seen_tx: dict[str, str] = {}
    for gid, lines in genes.items():
        _same_place(lines, f"gene_id '{gid}'", shown)
        first = lines[0]
        own = next((iv for iv in lines if iv.type == "gene"), None)
        out.append(
            Feature(
                first.seqid,
                first.source or ".",
                _gene_type(lines if own is None else [own]),
                min(iv.start0 for iv in lines),
                max(iv.end0 for iv in lines),
                None,
                first.strand,
                None,
                [("ID", gid), *(_own_attributes(own) if own is not None else [])],
                first.line0,
            )
        )
        for iv in lone.get(gid, []):
            out.append(_feature(iv, iv.type or ".", [("Parent", gid), *_own_attributes(iv)]))
        for tid, tx in tx_of_gene.get(gid, {}).items():
            if tid in seen_tx:
                raise _error(
                    f"transcript_id '{tid}' belongs to gene_id '{seen_tx[tid]}' and to "
                    f"gene_id '{gid}' (expected one gene per transcript)",
                    shown,
                    tx[0].line0,
                )
            seen_tx[tid] = gid
            _same_place(tx, f"transcript_id '{tid}'", shown)
            parts = [iv for iv in tx if iv.type not in GTF_WHOLE_TYPES]
            whole = next((iv for iv in tx if iv.type in GTF_WHOLE_TYPES), None)
            cds = [iv for iv in parts if iv.type == "CDS"]
            stops = [iv for iv in parts if iv.type == "stop_codon"]
            if join_stop_codons and cds and stops:
                others = [iv for iv in parts if iv.type != "CDS"]
                parts = others + _with_stops(cds, stops, tx[0].strand)
            out.append(
                Feature(
                    tx[0].seqid,
                    tx[0].source or ".",
                    "mRNA" if cds else "transcript",
                    min(iv.start0 for iv in tx + parts),
                    max(iv.end0 for iv in tx + parts),
                    None,
                    tx[0].strand,
                    None,
                    [
                        ("ID", tid),
                        ("Parent", gid),
                        *(_own_attributes(whole) if whole is not None else []),
                    ],
                    tx[0].line0,
                )
            )
            for iv in sorted(parts, key=lambda iv: (iv.start0, iv.end0, iv.line0)):
                out.append(_feature(iv, iv.type or ".", [("Parent", tid), *_own_attributes(iv)]))
    out.extend(_feature(iv, iv.type or ".", list(iv.attributes)) for iv in loose)
    return out


def _same_place(lines: Sequence[Interval], what: str, shown: str) -> None:
    first = lines[0]
    for iv in lines[1:]:
        if iv.seqid != first.seqid or iv.strand != first.strand:
            raise _error(
                f"{what} is on {iv.seqid} strand {iv.strand} here but on {first.seqid} "
                f"strand {first.strand} at line {first.line0 + 1} (expected one seqid and "
                "strand per gene and transcript)",
                shown,
                iv.line0,
            )


def read_gene_features(
    path: str | os.PathLike[str], *, what: str = "GFF3 or GTF"
) -> tuple[str, list[Feature]]:
    """A gene annotation, GFF3 or GTF (told by the name, else by the first lines;
    plain or gzip), as GFF3-style features: ``("gff3", read_gff3(path))`` or
    ``("gtf", gtf_gene_features(...))`` (the hierarchy built from ``gene_id`` and
    ``transcript_id``, stop codons joined to the CDS).  0-based half-open.
    BED is refused: it has no gene structure."""
    fmt = sniff_file(path, what) if str(path) != "-" else None
    if fmt == "gff3":
        return "gff3", read_gff3(Path(path))
    fmt, found = read_interval_file(path, fmt, what=what)
    if fmt == "bed":
        raise FeatureFormatError(
            f"reads as BED, which has no gene structure (expected {what} with genes)",
            path=display_name(path),
        )
    if fmt == "gff3":  # standard input, told by content
        return "gff3", [
            Feature(
                iv.seqid,
                iv.source or ".",
                iv.type or ".",
                iv.start0,
                iv.end0,
                None,
                iv.strand,
                iv.phase,
                list(iv.attributes),
                iv.line0,
            )
            for iv in found
        ]
    with paused_gc():
        return "gtf", gtf_gene_features(found, display_name(path))
