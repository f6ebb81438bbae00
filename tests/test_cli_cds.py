"""`annotate --cds --proteins`: spliced CDS and translations of every predicted mRNA.

Translations are checked against Biopython (Bio.Seq.translate, NCBI table 1), the
general-purpose reference library for the genetic code; IDs against annotate's own GFF3.
"""

from __future__ import annotations

from pathlib import Path

import pytest
from Bio import SeqIO
from click.testing import CliRunner

from seqstate.cli import main
from seqstate.commands import annotate_run


def run(args: list) -> object:
    return CliRunner().invoke(main, [str(a) for a in args], catch_exceptions=False)


@pytest.fixture(scope="module")
def genes_fasta(tmp_path_factory) -> Path:
    fasta = tmp_path_factory.mktemp("cds") / "g.fa"
    res = run(
        [
            "sample",
            "gene-segment",
            "--length",
            "80000",
            "--records",
            "3",
            "--seed",
            "5",
            "-o",
            fasta,
            "-q",
        ]
    )
    assert res.exit_code == 0, res.output
    return fasta


def _fasta(path: Path) -> list:
    with open(path, encoding="utf-8") as fh:
        return list(SeqIO.parse(fh, "fasta"))


def _mrna_ids(gff: Path) -> list[str]:
    out = []
    for line in gff.read_text().splitlines():
        cols = line.split("\t")
        if len(cols) == 9 and cols[2] == "mRNA":
            out.append(dict(kv.split("=", 1) for kv in cols[8].split(";"))["ID"])
    return out


def test_cds_and_proteins_match_the_gff3_and_translate_with_biopython(tmp_path, genes_fasta):
    out = tmp_path / "o"
    res = run(
        [
            "annotate",
            genes_fasta,
            "-m",
            "gene-segment",
            "-o",
            out,
            "--cds",
            "g.fna",
            "--proteins",
            "g.faa",
            "-q",
        ]
    )
    assert res.exit_code == 0, res.output
    mrnas = _mrna_ids(out / "g.gff3")
    cds = _fasta(out / "g.fna")
    prots = _fasta(out / "g.faa")
    assert mrnas and [r.id for r in cds] == mrnas == [r.id for r in prots]
    for c, p in zip(cds, prots):
        phase = int(c.description.split("phase=")[1].split()[0])
        body = c.seq[phase:]
        body = body[: len(body) - len(body) % 3]
        protein = str(body.translate(table=1))  # Biopython, NCBI table 1
        assert "*" not in protein.rstrip("*"), c.id  # no internal stop
        assert str(p.seq) == protein.rstrip("*")
    report = (out / "g.run.json").read_text()
    assert '"g.faa"' in report and '"g.fna"' in report


def test_long_records_give_the_same_cds_and_proteins(tmp_path, genes_fasta, monkeypatch):
    args = [
        "annotate",
        genes_fasta,
        "-m",
        "gene-segment",
        "--cds",
        "g.fna",
        "--proteins",
        "g.faa",
        "-q",
        "--tracks",
        "none",
    ]
    assert run(args + ["-o", tmp_path / "whole"]).exit_code == 0
    monkeypatch.setattr(annotate_run, "long_threshold", lambda *a: 1000)
    monkeypatch.setattr(annotate_run, "window_length", lambda *a: 8192)
    assert run(args + ["-o", tmp_path / "windows"]).exit_code == 0
    for name in ("g.fna", "g.faa", "g.gff3"):
        assert (tmp_path / "windows" / name).read_bytes() == (
            tmp_path / "whole" / name
        ).read_bytes()


@pytest.mark.parametrize(
    "extra,words",
    [
        (["-m", "cpg-island", "--cds", "x.fna"], "need a gene model"),
        (["-m", "gene-segment", "--proteins", "sub/x.faa"], "plain file-name part"),
        (["-m", "gene-segment", "--cds", "same", "--proteins", "same"], "different files"),
        (["-m", "gene-segment", "--proteins", "x.faa", "--translation-table", "99"], "99"),
    ],
)
def test_bad_cds_and_protein_options_are_one_line(tmp_path, genes_fasta, extra, words):
    out = tmp_path / "o"
    res = CliRunner().invoke(main, ["annotate", str(genes_fasta), "-o", str(out), *extra])
    assert res.exit_code == 2, res.output
    errors = [x for x in res.output.splitlines() if x.startswith("error:")]
    assert len(errors) == 1 and words in errors[0], res.output
    assert not out.exists()


def test_cds_to_standard_output_is_refused(genes_fasta):
    res = CliRunner().invoke(
        main, ["annotate", str(genes_fasta), "-m", "gene-segment", "-o", "-", "--cds", "x.fna"]
    )
    assert res.exit_code == 2 and "needs an output folder" in res.output
