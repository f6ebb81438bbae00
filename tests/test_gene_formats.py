"""``annotate --gene-formats bed12,gtf``: gene structures as BED12 and GTF 2.2.

Inputs: synthetic records (``seqstate sample gene-segment``, a fictional organism) with
genes on both strands and one gene cut by the record's end, annotated by the
gene-segment model.  Outside checks, each named beside its assertion:

- GTF 2.2: the Brent lab's definition ("GTF2.2: A Gene Annotation Format", Washington
  University): CDS without the stop codon, ``start_codon`` inside the CDS, codons up to
  3 bp, frame as the number of bases before the first whole codon, ``gene_id`` and
  ``transcript_id`` on every line.
- BED12: the UCSC Genome Browser's BED definition (common practice): 0-based
  chromStart, thickStart/thickEnd, blockCount, blockSizes, blockStarts relative to
  chromStart.
- gffutils 0.13 (a reference library) reads the GTF; pysam 0.24 (htslib) parses the
  BED12 through ``pysam.asBed``; GenomeTools 1.6 (Gremme, Steinbiss and Kurtz 2013,
  IEEE/ACM TCBB 10(3)) converts the GTF (``gt gtf_to_gff3``) and validates the result
  (``gt gff3validator -typecheck so``).  In CI (``CI=true``) a missing ``gt`` fails;
  elsewhere those tests are skipped.
- Start and stop codons: the standard genetic code (NCBI translation table 1).
"""

from __future__ import annotations

import os
import shutil
import subprocess
from pathlib import Path

import pytest
from click.testing import CliRunner

from seqstate.cli import main
from seqstate.commands.compare import compare_files
from seqstate.errors import FeatureFormatError, UsageError
from seqstate.io.gene_formats import (
    Transcript,
    bed12_line,
    gtf_lines,
    iter_transcripts,
    read_bed12,
)
from seqstate.io.gff3 import read_gff3
from seqstate.io.intervals import read_gene_features

GT = shutil.which("gt")
IN_CI = os.environ.get("CI", "").strip().lower() in ("true", "1", "yes")
needs_gt = pytest.mark.skipif(
    GT is None and not IN_CI,
    reason="GenomeTools' gt is not installed (Debian: apt-get install genometools)",
)
STOPS = {"TAA", "TAG", "TGA"}  # NCBI translation table 1
COMPLEMENT = str.maketrans("ACGTN", "TGCAN")


def run(*args: object) -> object:
    return CliRunner().invoke(main, [str(a) for a in args])


def ok(*args: object) -> None:
    result = run(*args)
    assert result.exit_code == 0, result.output


def read_fasta(path: Path) -> dict[str, str]:
    out: dict[str, list[str]] = {}
    name = ""
    for line in path.read_text().splitlines():
        if line.startswith(">"):
            name = line[1:].split()[0]
            out[name] = []
        else:
            out[name].append(line.strip().upper())
    return {k: "".join(v) for k, v in out.items()}


@pytest.fixture(scope="module")
def gene_run(tmp_path_factory) -> dict[str, Path]:
    root = tmp_path_factory.mktemp("genes")
    fasta, truth = root / "g.fa", root / "g.truth.gff3"
    ok(*"sample gene-segment --length 30000 --records 2 --seed 5 -q".split(), "-o", fasta,
       "--truth", truth)  # fmt: skip
    out = root / "out"
    ok("annotate", fasta, "-m", "gene-segment", "-o", out, "--stem", "g", "--tracks", "none",
       "--gene-formats", "gtf,bed12", "-q")  # fmt: skip
    return {
        "fasta": fasta,
        "truth": truth,
        "gff3": out / "g.gff3",
        "bed": out / "g.genes.bed",
        "gtf": out / "g.genes.gtf",
        "out": out,
    }


def gff_structure(gff3: Path) -> dict[str, dict]:
    feats = read_gff3(gff3)
    out: dict[str, dict] = {}
    for f in feats:
        if f.type == "mRNA":
            out[str(f.get("ID"))] = {"f": f, "exons": [], "cds": []}
    for f in feats:
        if f.type in ("exon", "CDS"):
            out[str(f.get("Parent"))]["exons" if f.type == "exon" else "cds"].append(f)
    return out


def test_the_run_has_genes_on_both_strands_and_a_cut_gene(gene_run):
    mrnas = [v["f"] for v in gff_structure(gene_run["gff3"]).values()]
    assert {f.strand for f in mrnas} == {"+", "-"}
    assert any(f.get("partial") == "true" for f in mrnas)
    assert any(f.get("partial") != "true" for f in mrnas)
    run_json = (gene_run["out"] / "g.run.json").read_text()
    assert '"g.genes.bed"' in run_json and '"g.genes.gtf"' in run_json


def test_bed12_one_line_per_mrna_matches_the_gff3(gene_run):
    # BED12 columns as the UCSC definition has them (common practice): 0-based
    # chromStart, blocks relative to chromStart, thick part = CDS span
    structure = gff_structure(gene_run["gff3"])
    beds = read_bed12(gene_run["bed"])
    assert [b.name for b in beds] == list(structure)
    for b in beds:
        s = structure[b.name]
        m = s["f"]
        assert (b.seqid, b.start0, b.end0, b.strand) == (m.seqid, m.start0, m.end0, m.strand)
        assert b.score == round(1000 * m.score)
        assert b.blocks == tuple(sorted((e.start0, e.end0) for e in s["exons"]))
        cds = s["cds"]
        assert (b.thick_start0, b.thick_end0) == (
            min(c.start0 for c in cds),
            max(c.end0 for c in cds),
        )


def test_bed12_parsed_by_pysam(gene_run):
    # reference library: pysam.asBed (htslib's tabix row parser) reads every column
    if IN_CI:  # CI=true: the test extra installs pysam, so a missing one fails
        import pysam
    else:
        pysam = pytest.importorskip("pysam")
    parser = pysam.asBed()
    lines = gene_run["bed"].read_text().splitlines()
    ours = read_bed12(gene_run["bed"])
    for line, b in zip(lines, ours):
        row = parser(line.encode(), len(line))
        assert (row.contig, row.start, row.end, row.name) == (b.seqid, b.start0, b.end0, b.name)
        assert (int(row.thickStart), int(row.thickEnd)) == (b.thick_start0, b.thick_end0)
        assert int(row.blockCount) == len(b.blocks)
        sizes = [int(x) for x in row.blockSizes.split(",")]
        starts = [int(x) for x in row.blockStarts.split(",")]
        assert [(b.start0 + a, b.start0 + a + n) for a, n in zip(starts, sizes)] == list(b.blocks)


def test_read_bed12_names_a_bad_line(tmp_path):
    bad = tmp_path / "bad.bed"
    bad.write_text("c\t0\t100\tm\t0\t+\t0\t100\t0\t2\t10,10\t0,50\n")  # blocks end at 60
    with pytest.raises(FeatureFormatError, match="line 1.*tile"):
        read_bed12(bad)
    bad.write_text("c\t0\t100\tm\t0\t+\t0\t100\n")
    with pytest.raises(FeatureFormatError, match="expected 12"):
        read_bed12(bad)


def codon(seq: str, parts: list[tuple[int, int]], strand: str) -> str:
    text = "".join(seq[a:b] for a, b in sorted(parts))
    return text if strand == "+" else text.translate(COMPLEMENT)[::-1]


def gtf_rows(path: Path) -> list[list[str]]:
    return [ln.split("\t") for ln in path.read_text().splitlines() if not ln.startswith("#")]


def test_gtf_follows_gtf_2_2(gene_run):
    # GTF 2.2 (Brent lab definition): CDS leaves the stop codon out, start_codon lies in
    # the CDS, each codon 3 bases in total; the codons read ATG and a stop of table 1
    seqs = read_fasta(gene_run["fasta"])
    structure = gff_structure(gene_run["gff3"])
    rows = gtf_rows(gene_run["gtf"])
    by_tx: dict[str, list[list[str]]] = {}
    for r in rows:
        assert r[8].startswith('gene_id "') and '; transcript_id "' in r[8]
        by_tx.setdefault(r[8].split('transcript_id "')[1].split('"')[0], []).append(r)
    assert list(by_tx) == list(structure)
    complete = 0
    for tid, lines in by_tx.items():
        m = structure[tid]["f"]
        assert {r[8] for r in lines} == {f'gene_id "{m.get("Parent")}"; transcript_id "{tid}";'}
        coding = {(c.start0, c.end0) for c in structure[tid]["cds"]}
        parts = {k: [(int(r[3]) - 1, int(r[4])) for r in lines if r[2] == k] for k in
                 ("CDS", "start_codon", "stop_codon", "exon")}  # fmt: skip
        assert parts["exon"] == sorted((e.start0, e.end0) for e in structure[tid]["exons"])
        gtf_cds = sum(b - a for a, b in parts["CDS"])
        stop = sum(b - a for a, b in parts["stop_codon"])
        assert gtf_cds + stop == sum(b - a for a, b in coding)
        for a, b in parts["start_codon"]:
            assert any(ca <= a and b <= cb for ca, cb in parts["CDS"])
        for a, b in parts["stop_codon"]:
            assert not any(ca < b and a < cb for ca, cb in parts["CDS"])
        seq = seqs[m.seqid]
        if m.get("partial") != "true":
            complete += 1
            assert sum(b - a for a, b in parts["start_codon"]) == 3 == stop
            assert codon(seq, parts["start_codon"], m.strand) == "ATG"
            assert codon(seq, parts["stop_codon"], m.strand) in STOPS
    assert complete >= 2


def test_gtf_of_a_partial_gene_has_no_codon_lines(gene_run):
    # GTF 2.2 writes codons only where they are; the GFF3 does not say which end of a
    # partial gene was cut, so a partial gene has none, and its CDS keeps every base
    partial = 0
    rows = gtf_rows(gene_run["gtf"])
    for tx in iter_transcripts(gene_run["gff3"]):
        mine = [r for r in rows if f'"{tx.mrna_id}"' in r[8]]
        kinds = {r[2] for r in mine}
        coding = sum(int(r[4]) - int(r[3]) + 1 for r in mine if r[2] == "CDS")
        assert tx.cut5 == tx.cut3
        if tx.cut5:
            partial += 1
            assert not kinds & {"start_codon", "stop_codon"}
            assert coding == sum(b - a for a, b, _ in tx.cds)
        else:
            assert {"start_codon", "stop_codon"} <= kinds
            assert coding == sum(b - a for a, b, _ in tx.cds) - 3
    assert partial >= 1


def test_gtf_read_back_by_our_reader_gives_the_gff3_structure(gene_run):
    # our GTF reader joins stop codons to CDS (GTF 2.2 leaves them out): the CDS pieces,
    # exons, mRNA and gene spans come back as the GFF3 has them
    _, feats = read_gene_features(gene_run["gtf"])
    codons = ("start_codon", "stop_codon")
    got = sorted(
        (f.type, f.seqid, f.start0, f.end0, f.strand) for f in feats if f.type not in codons
    )
    want = sorted(
        (f.type, f.seqid, f.start0, f.end0, f.strand) for f in read_gff3(gene_run["gff3"])
    )
    assert got == want


@pytest.mark.parametrize("ftype", ["CDS", "exon", "gene"])
def test_gtf_round_trips_through_compare_with_identical_figures(gene_run, ftype):
    a = compare_files(gene_run["gff3"], gene_run["truth"], ftype)
    b = compare_files(gene_run["gtf"], gene_run["truth"], ftype)
    assert a["counts"]["feature"]["predicted"] >= 3  # the figures are over real features
    a.pop("inputs"), b.pop("inputs")
    assert a == b
    both = compare_files(gene_run["gtf"], gene_run["gff3"], ftype)
    assert both["feature"]["sensitivity"] == both["feature"]["specificity"] == 1.0


def test_gtf_read_by_gffutils(gene_run):
    # reference library: gffutils builds genes and transcripts from gene_id/transcript_id
    gffutils = pytest.importorskip("gffutils")
    db = gffutils.create_db(str(gene_run["gtf"]), ":memory:", disable_infer_genes=False,
                            disable_infer_transcripts=False)  # fmt: skip
    structure = gff_structure(gene_run["gff3"])
    transcripts = {t.id: t for t in db.features_of_type("transcript")}
    assert set(transcripts) == set(structure)
    for tid, t in transcripts.items():
        m = structure[tid]["f"]
        assert (t.seqid, t.start - 1, t.end, t.strand) == (m.seqid, m.start0, m.end0, m.strand)
        parts = db.children(t, featuretype=("CDS", "stop_codon"))
        coding = {i for c in parts for i in range(c.start - 1, c.end)}
        want = {i for c in structure[tid]["cds"] for i in range(c.start0, c.end0)}
        assert coding == want


@needs_gt
def test_gtf_passes_gt_gtf_to_gff3_and_the_result_validates(gene_run, tmp_path):
    # GenomeTools 1.6: gtf_to_gff3 reads GTF 2.2 (exit 0), its GFF3 passes gff3validator
    assert GT is not None, "CI: GenomeTools' gt is missing (.ci/run installs genometools)"
    conv = subprocess.run([GT, "gtf_to_gff3", "-tidy", str(gene_run["gtf"])],
                          capture_output=True, text=True, timeout=300, check=False)  # fmt: skip
    assert conv.returncode == 0, conv.stderr
    out = tmp_path / "conv.gff3"
    out.write_text(conv.stdout)
    assert conv.stdout.count("\tCDS\t") == sum(
        1 for r in gtf_rows(gene_run["gtf"]) if r[2] == "CDS"
    )
    valid = subprocess.run([GT, "gff3validator", "-typecheck", "so", str(out)],
                           capture_output=True, text=True, timeout=300, check=False)  # fmt: skip
    assert valid.returncode == 0, valid.stderr


def test_gene_formats_are_deterministic(gene_run, tmp_path):
    out = tmp_path / "again"
    ok("annotate", gene_run["fasta"], "-m", "gene-segment", "-o", out, "--stem", "g",
       "--tracks", "none", "--gene-formats", "bed12,gtf", "-q")  # fmt: skip
    for name in ("g.genes.bed", "g.genes.gtf", "g.gff3"):
        assert (out / name).read_bytes() == (gene_run["out"] / name).read_bytes()


# ---------------------------------------------------------------- bad options


@pytest.mark.parametrize(
    "value, message",
    [
        ("bed13", "unknown format 'bed13'"),
        ("gtf,", "has an empty name"),
        ("gtf,gtf", "names a format twice"),
        ("", "has an empty name"),
    ],
)
def test_bad_gene_formats_is_one_error_line(gene_run, tmp_path, value, message):
    result = run("annotate", gene_run["fasta"], "-m", "gene-segment", "-o", tmp_path / "o",
                 "--gene-formats", value, "-q")  # fmt: skip
    assert result.exit_code == 2
    lines = result.output.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: ") and message in lines[0]
    assert not (tmp_path / "o").exists()


def test_gene_formats_with_a_model_without_genes_is_an_error(gene_run, tmp_path):
    result = run("annotate", gene_run["fasta"], "-m", "cpg-island", "-o", tmp_path / "o",
                 "--gene-formats", "bed12", "-q")  # fmt: skip
    assert result.exit_code == 2
    lines = result.output.strip().splitlines()
    assert lines == [
        "error: --gene-formats writes gene structures; model 'cpg-island' has no genes"
    ]
    assert not (tmp_path / "o").exists()


def test_gene_formats_with_stdout_is_an_error(gene_run):
    result = run("annotate", gene_run["fasta"], "-m", "gene-segment", "-o", "-",
                 "--gene-formats", "gtf")  # fmt: skip
    assert result.exit_code == 2
    assert result.output.strip().splitlines() == [
        "error: --gene-formats needs an output folder (not -o -)"
    ]


def test_existing_gene_file_needs_force(gene_run, tmp_path):
    out = tmp_path / "o"
    out.mkdir()
    (out / "g.genes.gtf").write_text("keep\n")
    result = run("annotate", gene_run["fasta"], "-m", "gene-segment", "-o", out, "--stem", "g",
                 "--tracks", "none", "--gene-formats", "gtf", "-q")  # fmt: skip
    assert result.exit_code == 2 and "already exists" in result.output
    assert sorted(p.name for p in out.iterdir()) == ["g.genes.gtf"]
    assert (out / "g.genes.gtf").read_text() == "keep\n"


# ---------------------------------------------------------------- codons split by introns


def test_split_codons_get_one_line_per_piece_with_their_frames():
    # GTF 2.2 (Brent lab definition): a codon split by an intron is one line per piece,
    # frame = bases before the first whole codon; the CDS leaves the stop codon out.
    # Minus strand, coding bases (0-based half-open) 100-102 | 200-260 | 300-302 read
    # 3'->5' in genomic order: the 5' end is at 302 (start codon: 300-302 and one base
    # at 259), the 3' end at 100 (stop codon: 100-102 and one base at 200).
    tx = Transcript("c", "-", "g1", "m1", 100, 302, 0.5)
    tx.exons = [(100, 102, "0.5"), (200, 260, "0.5"), (300, 302, "0.5")]
    tx.cds = [(100, 102, "0.5"), (200, 260, "0.5"), (300, 302, "0.5")]
    tx.phases = [1, 1, 0]  # 2 + 60 = 62 bases before the last piece: (3 - 62 % 3) % 3 = 1
    rows = [line.split("\t") for _, line in gtf_lines(tx)]
    got = [(r[2], int(r[3]), int(r[4]), r[7]) for r in rows]  # 1-based closed
    assert ("start_codon", 301, 302, "0") in got and ("start_codon", 260, 260, "1") in got
    assert ("stop_codon", 201, 201, "0") in got and ("stop_codon", 101, 102, "2") in got
    cds = [g for g in got if g[0] == "CDS"]
    assert cds == [("CDS", 202, 260, "1"), ("CDS", 301, 302, "0")]
    assert sum(b - a + 1 for _, a, b, _ in cds) == 64 - 3
    assert [g[0] for g in got].count("exon") == 3
    assert [int(r[3]) for r in rows] == sorted(int(r[3]) for r in rows)


def test_cut_ends_give_no_codons_and_keep_the_whole_cds():
    tx = Transcript("c", "+", "g1", "m1", 0, 30, None, cut5=True, cut3=True)
    tx.exons = [(0, 30, ".")]
    tx.cds = [(0, 30, ".")]
    tx.phases = [2]
    got = [
        (line.split("\t")[2], line.split("\t")[3], line.split("\t")[4]) for _, line in gtf_lines(tx)
    ]
    assert got == [("exon", "1", "30"), ("CDS", "1", "30")]
    assert bed12_line(tx).split("\t")[4] == "0"  # unscored: score 0


def test_a_quote_in_an_id_is_refused_in_gtf():
    tx = Transcript("c", "+", 'g"1', "m1", 0, 30, None)
    with pytest.raises(UsageError, match="cannot be written in GTF"):
        gtf_lines(tx)


# ---------------------------------------------------------------- region runs, unknown runs


def test_region_run_and_a_gene_cut_by_unknown_bases(gene_run, tmp_path):
    # a run of N inside a gene cuts it (partial_reason unknown_run), a --region run cuts
    # a gene at its end (here in an intron: the last CDS line ends 169 bases before it);
    # partial genes have no codon lines, and compare gives the GFF3's figures
    seqs = read_fasta(gene_run["fasta"])
    seq = list(seqs["sim1"])
    seq[5000:5600] = "N" * 600  # inside sim1.gene.1 (2303-19626)
    fasta = tmp_path / "n.fa"
    fasta.write_text(
        "".join(f">{k}\n{''.join(seq) if k == 'sim1' else v}\n" for k, v in seqs.items())
    )
    for extra in ([], ["--region", "sim1:1-29000", "--min-cds-length", "0"]):
        out = tmp_path / ("region" if extra else "whole")
        ok("annotate", fasta, "-m", "gene-segment", "-o", out, "--stem", "n", "--tracks",
           "none", "--gene-formats", "gtf,bed12", "-q", *extra)  # fmt: skip
        feats = read_gff3(out / "n.gff3")
        reasons = {r for f in feats if f.type == "mRNA" for r in f.values("partial_reason")}
        assert reasons >= ({"record_end", "unknown_run"} if extra else {"unknown_run"})
        txs = list(iter_transcripts(out / "n.gff3"))
        for t in txs:
            rows = [r for r in gtf_rows(out / "n.genes.gtf") if f'"{t.mrna_id}"' in r[8]]
            kinds = {r[2] for r in rows}
            assert bool(kinds & {"start_codon", "stop_codon"}) == (not t.cut5)
        if extra:
            cut = [t for t in txs if t.strand == "-" and t.cut5]
            assert cut and max(b for _, b, _ in cut[0].cds) < 29000
        # a GTF has no ##sequence-region: the stretch of a region run is given to compare
        region = "sim1:1-29000" if extra else None
        a = compare_files(out / "n.gff3", gene_run["truth"], "CDS", region)
        b = compare_files(out / "n.genes.gtf", gene_run["truth"], "CDS", region)
        a.pop("inputs"), b.pop("inputs")
        assert a == b


def test_record_ids_with_a_quote_or_a_control_character(gene_run, tmp_path):
    # a quote has no escape in a GTF value: one error line, nothing written; a control
    # character is written %XX in BED12 and GTF, as the tracks write it
    seqs = read_fasta(gene_run["fasta"])
    for rid, want in (('s"1', None), ("s\x011", "s%011")):
        fasta = tmp_path / "q.fa"
        fasta.write_text(f">{rid}\n{seqs['sim1']}\n")
        out = tmp_path / f"o{len(str(want))}"
        result = run("annotate", fasta, "-m", "gene-segment", "-o", out, "--tracks", "none",
                     "--gene-formats", "bed12,gtf", "-q")  # fmt: skip
        if want is None:
            assert result.exit_code == 2
            lines = result.output.strip().splitlines()
            assert len(lines) == 1 and lines[0].startswith("error: mRNA ID 's\"1.mRNA.1'")
            assert not out.exists() or not list(out.iterdir())
        else:
            assert result.exit_code == 0, result.output
            assert (out / "q.genes.bed").read_text().startswith(f"{want}\t")
            rows = gtf_rows(out / "q.genes.gtf")
            assert rows and all(r[0] == want and f'"{want}.mRNA.' in r[8] for r in rows)
