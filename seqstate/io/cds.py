"""Spliced coding sequences (FASTA ``.fna``) and their translations (``.faa``) of decoded genes.

Each :class:`~seqstate.kinds.genes.GenePrediction` gives one record in each file, named
by the ID of its GFF3 mRNA line (``SEQID.mRNA.N``, :func:`seqstate.kinds.genes.gene_lines`;
``N`` counts the record's genes from 1 in genomic order, as the GFF3 writer does).

Coordinates: the genes' CDS pieces are 0-based half-open on the plus strand, relative
to ``offset0`` (the same convention as :func:`seqstate.kinds.genes.write_genes`);
``read_bases(start0, end0)`` gives bases ``start0 .. end0 - 1`` of the record in record
coordinates.  The description of each FASTA record gives the span 1-based closed.

The CDS record is the pieces joined 5' to 3' on the gene's strand (reverse complement
for ``-``), bases as read (soft-masked lower case kept).  The protein is the translation
(Biopython, NCBI translation table ``table``) of that CDS read from its phase: the
first ``phase`` bases of the 5'-most piece (GFF3 1.26 phase: bases to drop to reach
the first whole codon) are skipped, an incomplete last codon is dropped, and a final
stop codon is not written (common practice for protein FASTA; the stop is not a
residue).  An internal stop stays as ``*``; a codon with an unknown base gives ``X``.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import TextIO

from seqstate.errors import UsageError
from seqstate.kinds.genes import GenePrediction, cds_phases

__all__ = [
    "FASTA_WIDTH",
    "check_table",
    "spliced_cds",
    "translate_cds",
    "write_cds_and_proteins",
]

#: Residues (or bases) per FASTA line.
FASTA_WIDTH = 60

_COMPLEMENT = bytes.maketrans(
    b"ACGTUMRWSYKVHDBNacgtumrwsykvhdbn", b"TGCAAKYWSRMBDHVNtgcaakywsrmbdhvn"
)


def check_table(table: int) -> int:
    """``table`` if it is an NCBI translation table Biopython knows; else
    :class:`~seqstate.errors.UsageError` listing the known ones."""
    from Bio.Data import CodonTable

    known = sorted(CodonTable.unambiguous_dna_by_id)
    if table not in known:
        raise UsageError(
            f"translation table {table} is not known (known tables: "
            f"{', '.join(str(t) for t in known)})"
        )
    return table


def spliced_cds(
    gene: GenePrediction, read_bases: Callable[[int, int], bytes], offset0: int = 0
) -> bytes:
    """The gene's CDS pieces joined 5' to 3' on its strand (bytes as read).

    Pieces are 0-based half-open relative to ``offset0``; ``read_bases`` takes record
    coordinates.  A minus-strand gene is reverse-complemented (IUPAC codes too).
    """
    parts = [read_bases(a + offset0, b + offset0) for a, b in gene.pieces]
    for (a, b), part in zip(gene.pieces, parts):
        if len(part) != b - a:
            raise ValueError(
                f"read_bases({a + offset0}, {b + offset0}) gave {len(part)} bases, not {b - a}"
            )
    joined = b"".join(parts)
    if gene.strand == "-":
        return joined.translate(_COMPLEMENT)[::-1]
    return joined


def translate_cds(cds: bytes, phase: int, table: int = 1) -> str:
    """The protein of a spliced CDS read from ``phase`` (0, 1, 2) with NCBI ``table``.

    The first ``phase`` bases are skipped, an incomplete last codon is dropped and one
    final stop is removed (see the module docstring).  Translation is Biopython's
    ``Bio.Seq.translate``.
    """
    from Bio.Seq import translate

    if phase not in (0, 1, 2):
        raise ValueError(f"phase {phase} is not 0, 1 or 2")
    body = cds[phase:].upper().decode("ascii")
    body = body[: len(body) - len(body) % 3]
    if not body:
        return ""
    protein = str(translate(body, table=table))
    return protein[:-1] if protein.endswith("*") else protein


def _write_record(handle: TextIO, name: str, description: str, text: str) -> None:
    handle.write(f">{name} {description}\n")
    for i in range(0, len(text), FASTA_WIDTH):
        handle.write(text[i : i + FASTA_WIDTH] + "\n")


def write_cds_and_proteins(
    genes: Sequence[GenePrediction],
    seqid: str,
    read_bases: Callable[[int, int], bytes],
    cds_handle: TextIO | None,
    protein_handle: TextIO | None,
    table: int = 1,
    *,
    offset0: int = 0,
    first_number: int = 1,
) -> int:
    """Write one CDS record (``cds_handle``) and one protein record (``protein_handle``)
    per gene; returns the number of genes written.  Either handle may be None.

    ``genes`` are one record's predictions in genomic order (as given to
    :func:`~seqstate.kinds.genes.write_genes`); gene ``k`` (from 0) is named
    ``SEQID.mRNA.{first_number + k}``, the ID of its GFF3 mRNA line.  The description
    is ``gene=SEQID.gene.N span=START-END strand=S phase=P`` (1-based closed span of
    the coding part on ``seqid``), plus ``partial=REASON[,REASON]`` for a partial gene
    and, on proteins, ``table=T``.  A gene with no whole codon after its phase gets a
    protein record of its header alone.
    ``table`` is an NCBI translation table number (:func:`check_table`).
    """
    check_table(table)
    for k, gene in enumerate(genes):
        number = first_number + k
        name = f"{seqid}.mRNA.{number}"
        g0, g1 = gene.span
        phases = cds_phases(gene)
        phase = phases[0] if gene.strand == "+" else phases[-1]
        desc = (
            f"gene={seqid}.gene.{number} span={g0 + offset0 + 1}-{g1 + offset0} "
            f"strand={gene.strand} phase={phase}"
        )
        if gene.partial:
            desc += f" partial={','.join(gene.partial_reasons)}"
        cds = spliced_cds(gene, read_bases, offset0)
        if cds_handle is not None:
            _write_record(cds_handle, name, desc, cds.decode("ascii"))
        if protein_handle is not None:
            protein = translate_cds(cds, phase, table)
            _write_record(protein_handle, name, f"{desc} table={table}", protein)
    return len(genes)
