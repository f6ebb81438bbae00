"""Spliced coding sequences (FASTA ``.fna``) and their translations (``.faa``) of decoded genes.

Each :class:`~seqstate.kinds.genes.GenePrediction` gives one record in each file, named
by the ID of its GFF3 mRNA line (``IDSTEM.mRNA.N``, :func:`seqstate.kinds.genes.gene_lines`;
``IDSTEM`` is the record ID, or ``ID:START-END`` for a ``--region`` run; ``N`` counts the
stretch's written genes from 1 in genomic order, as the GFF3 writer does).

Coordinates, one convention for the whole gene path: the genes' CDS pieces are 0-based
half-open positions of the *annotated stretch* (position 0 is record position
``offset0``), and ``read_bases(start0, end0)`` takes the same stretch positions (as
:class:`seqstate.kinds.stream.StreamRecord` readers and ``RecordData.seq`` do).  ``offset0``
is added only where a record coordinate is written: the description's span, 1-based
closed, as the GFF3 writer (:func:`seqstate.kinds.genes.write_genes`) adds it to its lines.

The CDS record is the pieces joined 5' to 3' on the gene's strand (reverse complement
for ``-``), in upper case (soft-masking says nothing about a coding sequence; IUPAC
codes are kept).  The protein is the translation
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


def spliced_cds(gene: GenePrediction, read_bases: Callable[[int, int], bytes]) -> bytes:
    """The gene's CDS pieces joined 5' to 3' on its strand, upper case.

    Pieces and ``read_bases`` both use 0-based half-open positions of the annotated
    stretch (see the module docstring).  A minus-strand gene is reverse-complemented
    (IUPAC codes too).
    """
    parts = [read_bases(a, b) for a, b in gene.pieces]
    for (a, b), part in zip(gene.pieces, parts):
        if len(part) != b - a:
            raise ValueError(f"read_bases({a}, {b}) gave {len(part)} bases, not {b - a}")
    joined = b"".join(parts).upper()
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
    id_stem: str | None = None,
) -> int:
    """Write one CDS record (``cds_handle``) and one protein record (``protein_handle``)
    per gene; returns the number of genes written.  Either handle may be None.

    ``genes`` are one stretch's written genes in genomic order (as given to
    :func:`~seqstate.kinds.genes.write_genes`), their pieces and ``read_bases`` in
    stretch positions (the stretch starts ``offset0`` bases into record ``seqid``).
    Gene ``k`` (from 0) is named ``IDSTEM.mRNA.{first_number + k}``, the ID of its GFF3
    mRNA line (``IDSTEM``: ``id_stem``, default ``seqid``).  The description is
    ``gene=IDSTEM.gene.N span=START-END strand=S phase=P`` (1-based closed span of the
    coding part on record ``seqid``), plus ``partial=REASON[,REASON]`` for a partial
    gene and, on proteins, ``table=T``.  A gene with no whole codon after its phase gets
    a protein record of its header alone.
    ``table`` is an NCBI translation table number (:func:`check_table`).
    """
    check_table(table)
    stem = seqid if id_stem is None else id_stem
    for k, gene in enumerate(genes):
        number = first_number + k
        name = f"{stem}.mRNA.{number}"
        g0, g1 = gene.span
        phases = cds_phases(gene)
        phase = phases[0] if gene.strand == "+" else phases[-1]
        desc = (
            f"gene={stem}.gene.{number} span={g0 + offset0 + 1}-{g1 + offset0} "
            f"strand={gene.strand} phase={phase}"
        )
        if gene.partial:
            desc += f" partial={','.join(gene.partial_reasons)}"
        cds = spliced_cds(gene, read_bases)
        if cds_handle is not None:
            _write_record(cds_handle, name, desc, cds.decode("ascii"))
        if protein_handle is not None:
            protein = translate_cds(cds, phase, table)
            _write_record(protein_handle, name, f"{desc} table={table}", protein)
    return len(genes)
