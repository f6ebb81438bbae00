"""`annotate --region` of gene and segment models: coordinates, IDs, gene outputs, filters.

Sources: the genome's bases at the GFF3's CDS coordinates are read with Biopython
(``Bio.SeqIO`` for the FASTA, ``Seq.reverse_complement``, ``Seq.translate`` with NCBI
table 1), the general-purpose reference library for sequences and the genetic code; the
GFF3 1.26 specification (Sequence Ontology) for 1-based closed coordinates, CDS phase and
'#' comment lines; GenomeTools' ``gt gff3validator`` for the files' validity.  The
records are synthetic, drawn by ``seqstate sample`` from the shipped models.
"""

from __future__ import annotations

import json
import shutil
import subprocess
from pathlib import Path

import pytest
from Bio import SeqIO
from Bio.Seq import Seq
from click.testing import CliRunner

from seqstate import __version__
from seqstate.cli import main
from seqstate.commands import annotate_run
from seqstate.io.tables import load_model, model_sha256

#: regions of the sampled gene records (1-based closed), starts > 1 and = 1
REGIONS = ["sim1:20001-90000", "sim2:30001-120000", "sim1:1-50000", "sim2:7-64000"]


def run(args: list) -> object:
    return CliRunner().invoke(main, [str(a) for a in args], catch_exceptions=False)


@pytest.fixture(scope="module")
def genes_fasta(tmp_path_factory) -> Path:
    """Two synthetic 120 kb records sampled from gene-segment (seed 5)."""
    fasta = tmp_path_factory.mktemp("regions") / "g.fa"
    res = run(
        ["sample", "gene-segment", "--length", 120000, "--records", 2, "--seed", 5, "-o", fasta]
    )
    assert res.exit_code == 0, res.output
    return fasta


@pytest.fixture(scope="module")
def genome(genes_fasta) -> dict[str, str]:
    """The records as Biopython reads them (Bio.SeqIO)."""
    with open(genes_fasta, encoding="utf-8") as fh:
        return {r.id: str(r.seq) for r in SeqIO.parse(fh, "fasta")}


@pytest.fixture
def long_path(monkeypatch):
    """Every record goes window by window (the long-record path), 8 kb windows."""
    monkeypatch.setattr(annotate_run, "long_threshold", lambda *a: 1000)
    monkeypatch.setattr(annotate_run, "window_length", lambda *a: 8192)


def _annotate(fasta: Path, out: Path, *extra) -> object:
    args = ["annotate", fasta, "-m", "gene-segment", "-o", out, "--tracks", "none", *extra]
    res = run(args)
    assert res.exit_code == 0, res.output
    return res


def _features(gff: Path) -> list[list[str]]:
    return [ln.split("\t") for ln in gff.read_text().splitlines() if ln and not ln.startswith("#")]


def _attrs(col9: str) -> dict[str, str]:
    return dict(kv.split("=", 1) for kv in col9.split(";"))


def _fasta(path: Path) -> list:
    with open(path, encoding="utf-8") as fh:
        return list(SeqIO.parse(fh, "fasta"))


def _check_cds_against_genome(out: Path, genome: dict[str, str]) -> int:
    """Every CDS record equals the genome at its GFF3 CDS lines; every protein is the
    Biopython translation of it; returns the mRNAs checked."""
    gff = next(out.glob("*.gff3"))
    feats = _features(gff)
    cds_recs = _fasta(next(out.glob("*.fna")))
    prots = _fasta(next(out.glob("*.faa")))
    mrnas = [_attrs(f[8])["ID"] for f in feats if f[2] == "mRNA"]
    assert [r.id for r in cds_recs] == mrnas == [r.id for r in prots]
    for rec, prot in zip(cds_recs, prots):
        pieces = sorted(
            (f for f in feats if f[2] == "CDS" and _attrs(f[8])["Parent"] == rec.id),
            key=lambda f: int(f[3]),
        )
        strand = pieces[0][6]
        # GFF3 columns 4-5 are 1-based closed: bases start-1 .. end-1 of the record
        joined = Seq("".join(genome[f[0]][int(f[3]) - 1 : int(f[4])] for f in pieces).upper())
        expected = joined if strand == "+" else joined.reverse_complement()  # Biopython
        assert str(rec.seq) == str(expected), rec.id
        phase = int((pieces[0] if strand == "+" else pieces[-1])[7])
        body = expected[phase:]
        body = body[: len(body) - len(body) % 3]
        protein = str(body.translate(table=1))  # Biopython, NCBI table 1
        assert "*" not in protein.rstrip("*"), rec.id  # no internal stop
        assert str(prot.seq) == protein.rstrip("*"), rec.id
    return len(mrnas)


@pytest.mark.parametrize("region", REGIONS)
@pytest.mark.parametrize("path", ["short", "long"])
def test_region_cds_and_proteins_are_the_genome_at_the_gff3_cds(
    tmp_path, genes_fasta, genome, region, path, request
) -> None:
    if path == "long":
        request.getfixturevalue("long_path")
    out = tmp_path / "o"
    _annotate(genes_fasta, out, "--region", region, "--cds", "--proteins")
    assert _check_cds_against_genome(out, genome) >= 2


@pytest.mark.parametrize("region", REGIONS[:2])
@pytest.mark.parametrize("path", ["short", "long"])
def test_region_run_equals_a_run_on_a_fasta_of_the_stretch(
    tmp_path, genes_fasta, genome, region, path, request
) -> None:
    if path == "long":
        request.getfixturevalue("long_path")
    seqid, span = region.rsplit(":", 1)
    start, end = (int(x) for x in span.split("-"))
    stretch = tmp_path / "stretch.fa"
    stretch.write_text(f">{seqid}\n{genome[seqid][start - 1 : end]}\n")
    _annotate(genes_fasta, tmp_path / "r", "--region", region, "--cds", "c.fna")
    _annotate(stretch, tmp_path / "s", "--cds", "c.fna")
    got = _features(next((tmp_path / "r").glob("*.gff3")))
    want = _features(tmp_path / "s" / "stretch.gff3")
    assert len(got) == len(want) > 0
    for g, w in zip(got, want):
        shifted = w[:3] + [str(int(w[3]) + start - 1), str(int(w[4]) + start - 1)] + w[5:8]
        # IDs: the region run's carry the stretch, the other's the record ID alone
        assert g[:8] == shifted
        assert g[8] == w[8].replace(f"{seqid}.", f"{region}.")
    assert [str(r.seq) for r in _fasta(tmp_path / "r" / "c.fna")] == [
        str(r.seq) for r in _fasta(tmp_path / "s" / "c.fna")
    ]


# ---------------------------------------------------------------- IDs and file names


def test_adjacent_region_runs_share_a_folder_and_concatenate_with_unique_ids(
    tmp_path, genes_fasta
) -> None:
    out = tmp_path / "o"
    for region in ("sim1:1-60000", "sim1:60001-120000"):
        _annotate(genes_fasta, out, "--region", region, "--cds", "--proteins")
    names = sorted(p.name for p in out.iterdir())
    for region in ("sim1_1-60000", "sim1_60001-120000"):
        # the default CDS and protein names carry the region, as STEM does
        assert f"g.{region}.cds.fna" in names and f"g.{region}.proteins.faa" in names
    ids = []
    for gff in sorted(out.glob("*.gff3")):
        region = gff.name.split(".")[1].replace("_", ":")
        for f in _features(gff):
            ident = _attrs(f[8])["ID"]
            assert ident.startswith(f"{region}."), ident
            ids.append(ident)
    assert len(ids) == len(set(ids)) > 0
    fasta_ids = [r.id for p in sorted(out.glob("*.fna")) for r in _fasta(p)]
    assert len(fasta_ids) == len(set(fasta_ids)) > 0


def test_whole_record_runs_keep_record_ids(tmp_path, genes_fasta) -> None:
    out = tmp_path / "o"
    _annotate(genes_fasta, out, "--cds")
    assert (out / "g.cds.fna").is_file()
    first = _features(out / "g.gff3")[0]
    assert _attrs(first[8])["ID"] == f"{first[0]}.gene.1"


def test_cpg_region_ids_carry_the_stretch(tmp_path) -> None:
    fasta = tmp_path / "c.fa"
    res = run(["sample", "cpg-island", "--length", 60000, "--records", 1, "--seed", 2, "-o", fasta])
    assert res.exit_code == 0, res.output
    region = "sim1:10001-60000"
    out = tmp_path / "o"
    res = run(["annotate", fasta, "-o", out, "--region", region, "--tracks", "none", "-q"])
    assert res.exit_code == 0, res.output
    feats = _features(out / "c.sim1_10001-60000.gff3")
    assert feats
    ids = [_attrs(f[8])["ID"] for f in feats]
    assert ids == [f"{region}.CpG_island.{k}" for k in range(1, len(ids) + 1)]


# ---------------------------------------------------------------- the GFF3 header


def test_gff3_header_names_tool_version_and_model(tmp_path, genes_fasta) -> None:
    out1, out2 = tmp_path / "a", tmp_path / "b"
    _annotate(genes_fasta, out1, "--region", REGIONS[0])
    _annotate(genes_fasta, out2, "--region", REGIONS[0])
    gff = next(out1.glob("*.gff3"))
    lines = gff.read_text().splitlines()
    model = load_model("gene-segment")
    assert lines[:5] == [
        "##gff-version 3",  # GFF3 1.26: the first line
        "##sequence-region sim1 20001 90000",
        f"# tool seqstate {__version__}",
        "# model gene-segment",
        f"# model_sha256 {model_sha256(model)}",
    ]
    assert not lines[5].startswith("#")
    report = json.loads(next(out1.glob("*.run.json")).read_text())
    assert report["model"]["sha256"] == model_sha256(model)
    assert gff.read_bytes() == next(out2.glob("*.gff3")).read_bytes()  # deterministic


def test_gff3_on_standard_output_has_the_same_header(tmp_path, genes_fasta) -> None:
    _annotate(genes_fasta, tmp_path / "o", "--region", REGIONS[1])
    res = run(["annotate", genes_fasta, "-m", "gene-segment", "--region", REGIONS[1], "-o", "-"])
    assert res.exit_code == 0
    text = next((tmp_path / "o").glob("*.gff3")).read_text()
    assert res.stdout == text


@pytest.mark.skipif(shutil.which("gt") is None, reason="GenomeTools' gt is not installed")
@pytest.mark.parametrize("model", ["gene-segment", "cpg-island"])
def test_region_gff3_passes_gt_gff3validator(tmp_path, genes_fasta, model) -> None:
    out = tmp_path / "o"
    res = run(["annotate", genes_fasta, "-m", model, "-o", out, "--region", REGIONS[0], "-q"])
    assert res.exit_code == 0, res.output
    gff = next(out.glob("*.gff3"))
    # GenomeTools' gt gff3validator: exit 0 for a valid GFF3 file
    done = subprocess.run(["gt", "gff3validator", str(gff)], capture_output=True, text=True)
    assert done.returncode == 0, done.stderr


# ---------------------------------------------------------------- upper case


def test_soft_masked_input_gives_upper_case_cds(tmp_path, genes_fasta, genome) -> None:
    masked = tmp_path / "m.fa"
    masked.write_text("".join(f">{k}\n{v.lower()}\n" for k, v in genome.items()))
    out = tmp_path / "o"
    _annotate(masked, out, "--region", REGIONS[0], "--cds", "--proteins")
    seqs = [str(r.seq) for r in _fasta(next(out.glob("*.fna")))]
    assert seqs and all(s == s.upper() for s in seqs)
    assert _check_cds_against_genome(out, genome) >= 2


# ---------------------------------------------------------------- gene filters


def _genes(gff: Path) -> list[tuple[int, int, str, int]]:
    """(start, end, strand, coding bases) of each gene, in file order."""
    feats = _features(gff)
    coding: dict[str, int] = {}
    for f in feats:
        if f[2] == "CDS":
            parent = _attrs(f[8])["Parent"]
            coding[parent] = coding.get(parent, 0) + int(f[4]) - int(f[3]) + 1
    return [
        (int(f[3]), int(f[4]), f[6], coding[_attrs(f[8])["ID"]]) for f in feats if f[2] == "mRNA"
    ]


@pytest.mark.parametrize("path", ["short", "long"])
def test_min_cds_length_drops_short_genes_and_numbers_stay_consecutive(
    tmp_path, genes_fasta, genome, path, request
) -> None:
    if path == "long":
        request.getfixturevalue("long_path")
    everything = tmp_path / "all"
    _annotate(genes_fasta, everything, "--min-cds-length", 0)
    genes = _genes(everything / "g.gff3")
    lengths = sorted(g[3] for g in genes)
    cut = lengths[len(lengths) // 2]  # about half the genes are shorter
    out = tmp_path / "f"
    res = _annotate(genes_fasta, out, "--min-cds-length", cut, "--cds", "--proteins")
    kept = _genes(out / "g.gff3")
    assert kept == [g for g in genes if g[3] >= cut]
    dropped = len(genes) - len(kept)
    assert 0 < dropped < len(genes)
    for seqid in ("sim1", "sim2"):
        feats = _features(out / "g.gff3")
        ids = [_attrs(f[8])["ID"] for f in feats if f[2] == "gene" and f[0] == seqid]
        assert ids == [f"{seqid}.gene.{k}" for k in range(1, len(ids) + 1)]
    _check_cds_against_genome(out, genome)  # CDS and protein names = the mRNA IDs
    report = json.loads((out / "g.run.json").read_text())
    assert sum(r["filtered_genes"]["min_cds_length"] for r in report["records"]) == dropped
    assert sum(r["genes"] for r in report["records"]) == len(kept)
    assert report["thresholds"]["min_cds_length"] == cut
    summary = f"{len(kept)} gene(s), {len(kept)} mRNA(s), {dropped} gene(s) filtered out, "
    assert summary in res.output


def test_min_gene_posterior_drops_genes_below_their_score(tmp_path, genes_fasta) -> None:
    everything = tmp_path / "all"
    _annotate(genes_fasta, everything)
    feats = _features(everything / "g.gff3")
    scores = sorted(float(f[5]) for f in feats if f[2] == "gene")
    cut = scores[len(scores) // 2]
    out = tmp_path / "f"
    _annotate(genes_fasta, out, "--min-gene-posterior", cut)
    kept = [float(f[5]) for f in _features(out / "g.gff3") if f[2] == "gene"]
    assert kept == [s for s in (float(f[5]) for f in feats if f[2] == "gene") if s >= cut]
    report = json.loads((out / "g.run.json").read_text())
    dropped = sum(r["filtered_genes"]["min_gene_posterior"] for r in report["records"])
    assert dropped == len(scores) - len(kept) > 0


def test_default_min_cds_length_is_in_the_report(tmp_path, genes_fasta) -> None:
    out = tmp_path / "o"
    _annotate(genes_fasta, out)
    report = json.loads((out / "g.run.json").read_text())
    assert report["thresholds"]["min_cds_length"] == 90
    assert report["thresholds"]["from"]["min_cds_length"] == "default"
    assert all(g[3] >= 90 for g in _genes(out / "g.gff3"))


def test_segment_options_on_a_gene_model_say_so(tmp_path, genes_fasta) -> None:
    res = _annotate(
        genes_fasta,
        tmp_path / "o",
        "--region",
        REGIONS[0],
        "--min-length",
        5,
        "--min-posterior",
        0.2,
    )
    notes = [ln for ln in res.output.splitlines() if ln.startswith("note:")]
    assert any("--min-length does not apply to gene models" in n for n in notes), res.output
    assert any("--min-posterior does not apply to gene models" in n for n in notes)


def test_gene_filters_on_a_segment_model_say_so(tmp_path, genes_fasta) -> None:
    res = run(
        [
            "annotate",
            genes_fasta,
            "-o",
            tmp_path / "o",
            "--region",
            REGIONS[0],
            "--min-cds-length",
            30,
            "--tracks",
            "none",
        ]
    )
    assert res.exit_code == 0, res.output
    assert "note: --min-cds-length applies to gene models only" in res.output
    assert "genes" not in res.output.splitlines()[-1]  # the summary of a segment model


@pytest.mark.parametrize(
    "extra,words",
    [
        (["--min-cds-length", "-1"], "--min-cds-length -1 is negative"),
        (["--min-gene-posterior", "1.5"], "--min-gene-posterior 1.5 is outside 0..1"),
        (["--min-gene-posterior", "-0.1"], "outside 0..1"),
        (["--min-cds-length", "x"], "'x' is not a valid integer"),
    ],
)
def test_bad_gene_filters_are_one_line_errors(tmp_path, genes_fasta, extra, words) -> None:
    out = tmp_path / "o"
    res = CliRunner().invoke(
        main, ["annotate", str(genes_fasta), "-m", "gene-segment", "-o", str(out), *extra]
    )
    assert res.exit_code == 2, res.output
    errors = [x for x in res.output.splitlines() if x.lower().startswith("error")]
    assert len(errors) == 1 and words in errors[0], res.output
    assert "Traceback" not in res.output
    assert not out.exists()
