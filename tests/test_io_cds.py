"""Spliced CDS and protein FASTA of decoded genes (seqstate.io.cds).

Sources: translations are checked against Biopython (``Bio.Seq.Seq.translate`` and
``reverse_complement``, ``Bio.SeqIO`` for reading the FASTA back); the GFF3 1.26
definition of phase (Sequence Ontology specification: bases to remove from the 5'
end of the piece to reach the next codon); NCBI translation tables 1 and 2 (from
memory: in table 2, TGA codes for W and AGA is a stop), checked by Biopython.  The
genes are compared with the GFF3 lines of seqstate's own gene writer
(seqstate.kinds.genes.write_genes).  Sampled records are synthetic (drawn from the
shipped gene-segment model).
"""

from __future__ import annotations

import io

import numpy as np
import pytest
from Bio import SeqIO
from Bio.Seq import Seq

from seqstate.engine import api
from seqstate.engine.sampling import sample_record
from seqstate.errors import UsageError
from seqstate.io.cds import check_table, spliced_cds, translate_cds, write_cds_and_proteins
from seqstate.io.gff3 import GFF3Writer, read_gff3
from seqstate.io.tables import load_model
from seqstate.kinds import track_groups
from seqstate.kinds.genes import (
    PARTIAL_RECORD_END,
    GenePrediction,
    decode_genes,
    genes_from_path,
    write_genes,
)


def _reader(seq: bytes):
    return lambda a, b: seq[a:b]


def _fasta(text: str) -> list:
    return list(SeqIO.parse(io.StringIO(text), "fasta"))


def test_plus_gene_two_pieces_by_hand() -> None:
    #        0         1         2
    #        0123456789012345678901234
    seq = b"ccATGAAAgtaagtttagCCCTAAgg"
    gene = GenePrediction("+", [(2, 8), (18, 24)], [0, 0])
    assert spliced_cds(gene, _reader(seq)) == b"ATGAAACCCTAA"
    cds, prot = io.StringIO(), io.StringIO()
    assert write_cds_and_proteins([gene], "chrS", _reader(seq), cds, prot) == 1
    assert cds.getvalue() == ">chrS.mRNA.1 gene=chrS.gene.1 span=3-24 strand=+ phase=0\n" + (
        "ATGAAACCCTAA\n"
    )
    # Biopython: ATG AAA CCC TAA -> M K P *; the final stop is not written
    assert str(Seq("ATGAAACCCTAA").translate(table=1)) == "MKP*"
    assert prot.getvalue().splitlines()[1] == "MKP"
    assert prot.getvalue().splitlines()[0].endswith(" table=1")


def test_minus_gene_is_reverse_complemented_and_read_from_its_phase() -> None:
    # a minus-strand gene, 5' partial: its 5'-most piece is the rightmost, phase 2
    fwd = Seq("ATGGCTTGGAAATAG")  # M A W K *
    body = "GG" + str(fwd)  # two bases before the first whole codon
    plus = str(Seq(body).reverse_complement())  # as it lies on the plus strand
    seq = ("tt" + plus[:7] + "aaaa" + plus[7:] + "cc").encode()
    pieces = [(2, 9), (13, 13 + len(plus) - 7)]
    gene = GenePrediction("-", pieces, [0, 2], (PARTIAL_RECORD_END,))
    assert spliced_cds(gene, _reader(seq)).decode() == body
    prot = io.StringIO()
    write_cds_and_proteins([gene], "c", _reader(seq), None, prot, first_number=4)
    head, residues = prot.getvalue().splitlines()
    assert head.startswith(">c.mRNA.4 gene=c.gene.4 ") and " phase=2 " in head
    assert "partial=record_end" in head
    assert residues == str(fwd.translate(table=1)).rstrip("*") == "MAWK"  # Biopython


def test_translation_table_is_chosen() -> None:
    cds = b"ATGTGAAGATAA"
    # Biopython, NCBI table 1: TGA is a stop; table 2: TGA is W and AGA a stop
    assert str(Seq(cds.decode()).translate(table=1)) == "M*R*"
    assert str(Seq(cds.decode()).translate(table=2)) == "MW**"
    assert translate_cds(cds, 0, 1) == "M*R"  # an internal stop stays visible
    assert translate_cds(cds, 0, 2) == "MW*"
    assert translate_cds(b"ATGNNNAAAC", 0) == "MXK"  # unknown codon, partial last codon
    assert translate_cds(b"AT", 0) == ""
    assert check_table(11) == 11
    with pytest.raises(UsageError, match="translation table 99 is not known"):
        check_table(99)
    with pytest.raises(UsageError, match="translation table 0"):
        write_cds_and_proteins([], "c", _reader(b""), None, io.StringIO(), table=0)


def test_offset_moves_only_the_written_span_not_the_reads() -> None:
    # one convention: pieces and read_bases are stretch positions; offset0 (where the
    # stretch starts in its record) is added only to the span written
    stretch = b"ccATGTAAcc"  # record bases 5 .. 14
    gene = GenePrediction("+", [(2, 8)], [0])
    out = io.StringIO()
    write_cds_and_proteins([gene], "r", _reader(stretch), out, None, offset0=5)
    assert out.getvalue() == ">r.mRNA.1 gene=r.gene.1 span=8-13 strand=+ phase=0\nATGTAA\n"
    named = io.StringIO()
    write_cds_and_proteins([gene], "r", _reader(stretch), named, None, offset0=5, id_stem="r:6-15")
    assert named.getvalue().startswith(">r:6-15.mRNA.1 gene=r:6-15.gene.1 span=8-13 ")


def test_cds_is_upper_case_whatever_the_soft_masking() -> None:
    seq = b"ccatgAAAgtaagtttagCCCtaagg"
    plus = GenePrediction("+", [(2, 8), (18, 24)], [0, 0])
    assert spliced_cds(plus, _reader(seq)) == b"ATGAAACCCTAA"
    minus = GenePrediction("-", [(2, 8)], [0])
    # Biopython reverse complement of the upper-cased bases
    assert spliced_cds(minus, _reader(seq)).decode() == str(Seq("ATGAAA").reverse_complement())


def test_read_bases_that_return_too_few_bases_are_an_error() -> None:
    gene = GenePrediction("+", [(0, 6)], [0])
    with pytest.raises(ValueError, match="gave 3 bases, not 6"):
        write_cds_and_proteins([gene], "r", _reader(b"ATG"), io.StringIO(), None)


# ---------------------------------------------------------------- sampled gene records


@pytest.fixture(scope="module")
def sampled_genes():
    """Four synthetic records of 60 kb drawn from gene-segment (seed 3), their true genes
    and the Viterbi genes decoded from them."""
    model = load_model("gene-segment")
    tables = api.prepare(model)
    rng = np.random.default_rng(3)
    alphabet = np.frombuffer(model.alphabet.encode("ascii"), dtype=np.uint8)
    out = []
    for r in range(4):
        path, sym = sample_record(tables, 60_000, rng)
        seq = alphabet[sym].tobytes()
        truth = genes_from_path(path, model)
        codes = api.encode(tables, seq)
        unknown = np.zeros(len(seq), dtype=bool)
        decoded = decode_genes(model, tables, codes, unknown, "viterbi", 10, f"s{r + 1}")
        out.append((f"s{r + 1}", seq, truth, decoded))
    return model, out


def _gff3_of(model, seqid: str, genes: list[GenePrediction], path) -> list:
    text = io.StringIO()
    write_genes(
        GFF3Writer(text), None, model, None, None, None, track_groups(model), genes, seqid, 0
    )
    path.write_text(text.getvalue())
    return read_gff3(path)


@pytest.mark.parametrize("which", ["truth", "decoded"])
def test_sampled_proteins_translate_from_the_cds_without_internal_stops(
    sampled_genes, which, tmp_path
) -> None:
    model, records = sampled_genes
    n_genes = n_multi = 0
    strands = set()
    for seqid, seq, truth, decoded in records:
        genes = truth if which == "truth" else decoded
        cds, prot = io.StringIO(), io.StringIO()
        write_cds_and_proteins(genes, seqid, _reader(seq), cds, prot)
        cds_recs, prot_recs = _fasta(cds.getvalue()), _fasta(prot.getvalue())
        feats = _gff3_of(model, seqid, genes, tmp_path / f"{seqid}-{which}.gff3")
        mrnas = [f.get("ID") for f in feats if f.type == "mRNA"]
        # one record per GFF3 mRNA, same IDs, same order (seqstate's own GFF3 writer)
        assert [r.id for r in cds_recs] == [r.id for r in prot_recs] == mrnas
        for rec_c, rec_p in zip(cds_recs, prot_recs):
            pieces = sorted(
                (f for f in feats if f.type == "CDS" and f.get("Parent") == rec_c.id),
                key=lambda f: f.start0,
            )
            strand = pieces[0].strand
            strands.add(strand)
            # the CDS file equals the GFF3 CDS lines spliced (Biopython reverse complement)
            joined = Seq(b"".join(seq[f.start0 : f.end0] for f in pieces).decode())
            assert str(rec_c.seq) == str(joined if strand == "+" else joined.reverse_complement())
            five = pieces[0] if strand == "+" else pieces[-1]
            assert f"phase={five.phase}" in rec_c.description
            # Biopython translation of the CDS record from its GFF3 phase
            body = str(rec_c.seq)[five.phase :]
            body = body[: len(body) - len(body) % 3]
            expected = str(Seq(body).translate(table=1))
            assert "*" not in expected[:-1], rec_c.id  # no internal stop
            assert str(rec_p.seq) == expected.rstrip("*"), rec_c.id
            n_genes += 1
            n_multi += len(pieces) > 1
    assert n_genes >= 3 and n_multi >= 2 and strands == {"+", "-"}, (n_genes, n_multi, strands)


# ---------------------------------------------------------------- partial genes


def test_cut_genes_are_partial_and_translate_from_their_phase(sampled_genes, tmp_path) -> None:
    # cut each sampled record inside a coding base of its first true multi-piece gene
    # (not at a codon start): the remainder is a gene that runs into the record's start
    model, records = sampled_genes
    checked = 0
    for seqid, seq, truth, _ in records:
        gene = next((g for g in truth if len(g.pieces) > 1 and not g.partial), None)
        if gene is None:  # a sampled record may hold no complete multi-exon gene
            continue
        a, b = gene.pieces[0] if gene.strand == "+" else gene.pieces[-1]
        cut = a + 4 if gene.strand == "+" else b - 4  # 4 bases into the 5'-most piece
        tables = api.prepare(model)
        rng_path = _true_path(model, tables, seqid)
        part = rng_path[cut:] if gene.strand == "+" else rng_path[:cut]
        sub = seq[cut:] if gene.strand == "+" else seq[:cut]
        genes = genes_from_path(part, model)
        first = genes[0] if gene.strand == "+" else genes[-1]
        assert first.partial_reasons == (PARTIAL_RECORD_END,)
        # GFF3: partial=true and our reason on gene and mRNA only (seqstate's own writer)
        feats = _gff3_of(model, seqid, genes, tmp_path / f"{seqid}-cut.gff3")
        number = genes.index(first) + 1
        marked = 0
        for f in feats:
            mine = (f.get("ID") or "") if f.type in ("gene", "mRNA") else ""
            if mine in (f"{seqid}.gene.{number}", f"{seqid}.mRNA.{number}"):
                assert f.get("partial") == "true" and f.get("partial_reason") == "record_end"
                marked += 1
            elif f.type in ("exon", "CDS"):
                assert f.get("partial") is None
        assert marked == 2  # its gene and mRNA lines
        # the protein read from the phase is the tail of the whole gene's protein
        prot_cut, prot_whole = io.StringIO(), io.StringIO()
        write_cds_and_proteins([first], seqid, _reader(sub), None, prot_cut)
        write_cds_and_proteins([gene], seqid, _reader(seq), None, prot_whole)
        cut_p = _fasta(prot_cut.getvalue())[0]
        whole_p = str(_fasta(prot_whole.getvalue())[0].seq)
        # 4 bases into the gene: codon 1 is lost whole, codon 2 loses its first base, so
        # the partial protein starts at residue 3 (phase 2)
        assert "phase=2" in cut_p.description and "partial=record_end" in cut_p.description
        assert str(cut_p.seq) == whole_p[2:]
        assert "*" not in whole_p and len(whole_p) > 10
        checked += 1
    assert checked >= 2


def _true_path(model, tables, seqid: str) -> np.ndarray:
    """The true path of sampled record ``seqid`` (the draws of the fixture, redone)."""
    rng = np.random.default_rng(3)
    for r in range(4):
        path, _ = sample_record(tables, 60_000, rng)
        if f"s{r + 1}" == seqid:
            return path
    raise AssertionError(seqid)
