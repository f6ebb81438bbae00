"""Gene structures of a seqstate GFF3 as BED12 and GTF 2.2 (``annotate --gene-formats``).

Both are made from the GFF3 a gene-model run wrote (gene -> mRNA -> exon/CDS, the
children of a gene right after it), read one gene at a time, so memory holds one gene.

BED12 (0-based half-open, one line per mRNA): chromStart/chromEnd the mRNA's span,
name its ID, score ``round(1000 * p)`` with ``p`` the mRNA's GFF3 score (the mean
posterior of the strand's gene states over the mRNA, 0..1; an unscored mRNA gets 0),
thickStart/thickEnd the span of its CDS, itemRgb ``0``, and the blocks its exons
(sizes and starts relative to chromStart, comma-separated).

GTF 2.2 (1-based closed; the feature names and rules of the GTF 2.2 definition,
Brent lab, Washington University, "GTF2.2: A Gene Annotation Format"): per mRNA its
``exon`` lines, ``CDS`` lines without the stop codon, a ``start_codon`` (the first
three coding bases, included in the CDS) and a ``stop_codon`` (the last three, not in
the CDS); a codon split by an intron is written as one line per piece, each with the
frame of its first base.  Every line has ``gene_id "GENE"; transcript_id "MRNA";``
(the GFF3 IDs).  Scores: those of the GFF3 exon and CDS lines; codons ``.``.
In both, control characters of record IDs are written ``%XX``, as in the tracks.

A partial gene (``partial=true`` in the GFF3) gets no codon lines and its CDS keeps
every coding base: the GFF3 does not say which end was cut (a gene that runs into the
end of the stretch may end there in a CDS or in an intron, and one cut at a run of
unknown bases may lose either end), and a codon line at a cut end would be wrong.
``seqstate compare`` joins a GTF's stop codons to its
CDS, so the GTF gives the same figures as the GFF3 it came from.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import TextIO

from seqstate.errors import FeatureFormatError, UsageError
from seqstate.io.files import display_name, open_input, text_lines
from seqstate.io.gff3 import Feature, iter_gff3
from seqstate.io.tracks import escape_text

__all__ = [
    "GENE_FORMATS",
    "SUFFIXES",
    "BedTranscript",
    "Transcript",
    "bed12_line",
    "gtf_lines",
    "iter_transcripts",
    "parse_gene_formats",
    "read_bed12",
    "write_gene_formats",
]

#: ``--gene-formats`` values, and the file name each is written under (after STEM).
GENE_FORMATS = ("bed12", "gtf")
SUFFIXES = {"bed12": ".genes.bed", "gtf": ".genes.gtf"}
SOURCE = "seqstate"


def parse_gene_formats(text: str | None) -> tuple[str, ...]:
    """``--gene-formats`` text (``bed12,gtf``) -> the formats in :data:`GENE_FORMATS`
    order; raises :class:`UsageError` for an empty, unknown or repeated name."""
    if text is None:
        return ()
    names = [part.strip() for part in text.split(",")]
    if not text.strip() or any(not n for n in names):
        raise UsageError(
            f"--gene-formats {text!r} has an empty name: expected bed12 and/or gtf, comma-separated"
        )
    for name in names:
        if name not in GENE_FORMATS:
            raise UsageError(
                f"--gene-formats: unknown format {name!r}: expected bed12 and/or gtf, "
                "comma-separated"
            )
    if len(set(names)) < len(names):
        raise UsageError(f"--gene-formats {text!r} names a format twice")
    return tuple(f for f in GENE_FORMATS if f in names)


@dataclass
class Transcript:
    """One mRNA of a GFF3 gene model, 0-based half-open (plus-strand coordinates).

    ``exons`` and ``cds`` are in genomic order, each ``(start0, end0, score text)``;
    ``phases`` the CDS phases (GFF3 column 8); ``cut5`` / ``cut3`` whether the
    transcript's 5' / 3' end may be cut (no codon line there; see the module docstring).
    """

    seqid: str
    strand: str
    gene_id: str
    mrna_id: str
    start0: int
    end0: int
    score: float | None
    exons: list[tuple[int, int, str]] = field(default_factory=list)
    cds: list[tuple[int, int, str]] = field(default_factory=list)
    phases: list[int] = field(default_factory=list)
    cut5: bool = False
    cut3: bool = False


def _score_text(score: float | None) -> str:
    # the annotate GFF3 writes scores as "{:.4f}": formatting the float read back
    # gives the same text
    return "." if score is None else f"{score:.4f}"


def iter_transcripts(gff3: str | Path) -> Iterator[Transcript]:
    """The mRNAs of a seqstate gene-model GFF3, gene by gene in file order.

    Raises :class:`FeatureFormatError` for an mRNA whose gene is not the gene line
    before it, or an exon/CDS whose mRNA is not in the current gene.
    """
    shown = display_name(gff3)
    current: dict[str, Transcript] = {}
    gene: Feature | None = None
    for f in iter_gff3(gff3):
        if f.type == "gene":
            yield from current.values()
            current = {}
            gene = f
        elif f.type == "mRNA":
            parent = f.get("Parent")
            if gene is None or parent != gene.get("ID"):
                raise FeatureFormatError(
                    "mRNA line does not follow its gene line", path=shown, line0=f.line0
                )
            cut5, cut3 = _cut_ends(f)
            current[str(f.get("ID"))] = Transcript(
                f.seqid,
                f.strand,
                str(parent),
                str(f.get("ID")),
                f.start0,
                f.end0,
                f.score,
                cut5=cut5,
                cut3=cut3,
            )
        elif f.type in ("exon", "CDS"):
            tx = current.get(f.get("Parent") or "")
            if tx is None:
                raise FeatureFormatError(
                    f"{f.type} line whose Parent is not an mRNA of the gene before it",
                    path=shown,
                    line0=f.line0,
                )
            piece = (f.start0, f.end0, _score_text(f.score))
            if f.type == "exon":
                tx.exons.append(piece)
            else:
                tx.cds.append(piece)
                tx.phases.append(0 if f.phase is None else f.phase)
    yield from current.values()


def _cut_ends(mrna: Feature) -> tuple[bool, bool]:
    """(5' end cut, 3' end cut) of a GFF3 mRNA line: both for a partial one (see the
    module docstring), neither for a complete one."""
    partial = mrna.get("partial") == "true"
    return partial, partial


# ---------------------------------------------------------------- BED12


def bed12_line(tx: Transcript) -> str:
    """The BED12 line of one mRNA (ends with a newline)."""
    exons = sorted((a, b) for a, b, _ in tx.exons) or [(tx.start0, tx.end0)]
    if tx.cds:
        thick = (min(a for a, _, _ in tx.cds), max(b for _, b, _ in tx.cds))
    else:
        thick = (tx.start0, tx.start0)
    score = 0 if tx.score is None else int(round(1000 * min(1.0, max(0.0, tx.score))))
    cells = [
        escape_text(tx.seqid),
        str(tx.start0),
        str(tx.end0),
        escape_text(tx.mrna_id),
        str(score),
        tx.strand,
        str(thick[0]),
        str(thick[1]),
        "0",
        str(len(exons)),
        ",".join(str(b - a) for a, b in exons),
        ",".join(str(a - tx.start0) for a, _ in exons),
    ]
    return "\t".join(cells) + "\n"


@dataclass(frozen=True)
class BedTranscript:
    """One BED12 line read back: span, name, score, strand, thick part, blocks
    (``blocks`` absolute 0-based half-open, in genomic order)."""

    seqid: str
    start0: int
    end0: int
    name: str
    score: int
    strand: str
    thick_start0: int
    thick_end0: int
    blocks: tuple[tuple[int, int], ...]
    line0: int


def _int(text: str, column: int, shown: str, line0: int) -> int:
    try:
        value = int(text)
    except ValueError:
        raise FeatureFormatError(
            f"column {column} {text!r} is not a whole number", path=shown, line0=line0
        ) from None
    if value < 0:
        raise FeatureFormatError(
            f"column {column} is {value}; expected 0 or more", path=shown, line0=line0
        )
    return value


def read_bed12(path: str | Path) -> list[BedTranscript]:
    """Read a BED12 file (plain or gzip); ``track``/``browser``/``#`` lines skipped.

    Raises :class:`FeatureFormatError` naming the line for a line without 12 columns,
    a column that is not a number, blocks that do not match blockCount, leave the
    span, overlap, or do not start at chromStart and end at chromEnd, or a thick part
    outside the span.
    """
    shown = display_name(path)
    out: list[BedTranscript] = []
    with open_input(path, FeatureFormatError, "BED12") as handle:
        for line0, line in text_lines(handle, shown, FeatureFormatError):
            if (
                not line.strip()
                or line.startswith("#")
                or line.split(None, 1)[0]
                in (
                    "track",
                    "browser",
                )
            ):
                continue
            cols = line.rstrip("\n").split("\t")
            if len(cols) != 12:
                raise FeatureFormatError(
                    f"{len(cols)} tab-separated columns, expected 12 (BED12)",
                    path=shown,
                    line0=line0,
                )
            start, end = _int(cols[1], 2, shown, line0), _int(cols[2], 3, shown, line0)
            thick_a, thick_b = _int(cols[6], 7, shown, line0), _int(cols[7], 8, shown, line0)
            count = _int(cols[9], 10, shown, line0)
            sizes = [_int(x, 11, shown, line0) for x in cols[10].rstrip(",").split(",")]
            starts = [_int(x, 12, shown, line0) for x in cols[11].rstrip(",").split(",")]
            blocks = tuple((start + s, start + s + n) for s, n in zip(starts, sizes))
            ok = (
                start < end
                and len(sizes) == len(starts) == count > 0
                and blocks[0][0] == start
                and blocks[-1][1] == end
                and all(a < b for a, b in blocks)
                and all(p[1] <= q[0] for p, q in zip(blocks, blocks[1:]))
            )
            if not ok:
                raise FeatureFormatError(
                    "blocks (columns 10-12) do not tile chromStart..chromEnd in order",
                    path=shown,
                    line0=line0,
                )
            if not start <= thick_a <= thick_b <= end:
                raise FeatureFormatError(
                    "thickStart..thickEnd lies outside chromStart..chromEnd",
                    path=shown,
                    line0=line0,
                )
            out.append(
                BedTranscript(
                    cols[0],
                    start,
                    end,
                    cols[3],
                    _int(cols[4], 5, shown, line0),
                    cols[5],
                    thick_a,
                    thick_b,
                    blocks,
                    line0,
                )
            )
    return out


# ---------------------------------------------------------------- GTF 2.2


def _take(pieces: list[tuple[int, int]], n: int, strand: str, from_5: bool) -> list[list[int]]:
    """The ``n`` coding bases at the 5' (``from_5``) or 3' end of the transcript, as
    pieces ``[start0, end0, bases before it in the codon]`` in transcript order from that
    end (``pieces`` in genomic order)."""
    order = pieces if (strand != "-") == from_5 else pieces[::-1]
    low_first = strand != "-" if from_5 else strand == "-"
    out: list[list[int]] = []
    done = 0
    for a, b in order:
        if done == n:
            break
        k = min(n - done, b - a)
        before = done if from_5 else n - done - k  # bases of the codon 5' of the piece
        out.append([a, a + k, before] if low_first else [b - k, b, before])
        done += k
    return out


def _frame(before: int) -> int:
    return (3 - before % 3) % 3


def gtf_lines(tx: Transcript) -> list[tuple[int, str]]:
    """The GTF 2.2 lines of one mRNA as ``(start0, text)``, in genomic order."""
    if '"' in tx.gene_id or '"' in tx.mrna_id:
        raise UsageError(
            f"mRNA ID {tx.mrna_id!r} (gene {tx.gene_id!r}) cannot be written in GTF: a "
            "GTF value is quoted and has no escape for '\"' (rename the FASTA record)"
        )
    gene, mrna = escape_text(tx.gene_id), escape_text(tx.mrna_id)
    attrs = f'gene_id "{gene}"; transcript_id "{mrna}";'
    seqid = escape_text(tx.seqid)  # control characters as %XX, as the tracks write them
    pieces = [(a, b) for a, b, _ in tx.cds]
    coding = sum(b - a for a, b in pieces)
    rows: list[tuple[int, int, str, int, str, str]] = []  # start0, rank, type, end0, score, frame
    for a, b, score in tx.exons:
        rows.append((a, 0, "exon", b, score, "."))
    stop = _take(pieces, 3, tx.strand, False) if not tx.cut3 and coding >= 6 else []
    for (a, b, score), phase in zip(tx.cds, tx.phases):
        for sa, sb, _ in stop:  # the stop codon leaves the CDS (GTF 2.2)
            if sa == a and sb == b:
                a = b
            elif sa == a:
                a = sb
            elif sb == b:
                b = sa
        if a < b:
            rows.append((a, 1, "CDS", b, score, str(phase)))
    if not tx.cut5 and coding >= 3:
        for a, b, before in _take(pieces, 3, tx.strand, True):
            rows.append((a, 2, "start_codon", b, ".", str(_frame(before))))
    for a, b, before in stop:
        rows.append((a, 3, "stop_codon", b, ".", str(_frame(before))))
    rows.sort()
    return [
        (
            a,
            "\t".join([seqid, SOURCE, kind, str(a + 1), str(b), score, tx.strand, frame, attrs])
            + "\n",
        )
        for a, _, kind, b, score, frame in rows
    ]


# ---------------------------------------------------------------- writing


def write_gene_formats(gff3: str | Path, handles: dict[str, TextIO]) -> int:
    """Write the gene structures of ``gff3`` in each format of ``handles``
    (``{"bed12": handle, "gtf": handle}``, either may be absent); returns the mRNAs."""
    count = 0
    gtf = handles.get("gtf")
    bed = handles.get("bed12")
    if gtf is not None:
        gtf.write("#gtf-version 2.2\n")
    for tx in iter_transcripts(gff3):
        count += 1
        if bed is not None:
            bed.write(bed12_line(tx))
        if gtf is not None:
            gtf.writelines(text for _, text in gtf_lines(tx))
    return count
