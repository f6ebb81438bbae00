"""``seqstate merge`` of gene-model groups: CDS and protein FASTA, BED12/GTF gene
structures and the bgzip/tabix copies of ``--index-outputs``.

The expected output is seqstate's own annotate of the whole file with the same options
and stem: every gathered file must have its bytes (the run report: every field but the
invocation ones).  Inputs are synthetic (``seqstate sample gene-segment``, a fictional
organism).
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import pysam
import pytest
from helpers import cli_ok as ok
from helpers import cli_run as run
from helpers import one_error_line as one_error
from helpers import without_invocation

from seqstate.commands import merge_outputs as mo

GROUPS = [["gx1"], ["gx2", "gx3"], ["gx4"]]
GENES = ["--cds", "--proteins", "--gene-formats", "bed12,gtf", "--index-outputs"]
COMMON = ["-m", "gene-segment", "--tracks", "bedgraph", "-q"]


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    """Four 20 kb gene-segment records (seed 5), a direct run and three group runs."""
    root = tmp_path_factory.mktemp("merge-genes")
    fasta = root / "g.fa"
    ok("sample", "gene-segment", "--length", 20000, "--records", 4, "--seed", 5,
       "--prefix", "gx", "-o", fasta)  # fmt: skip
    ok("annotate", fasta, "-o", root / "direct", "--stem", "asm", *GENES, *COMMON)
    for i, ids in enumerate(GROUPS):
        ok("annotate", fasta, "-o", root / f"g{i}", "--records", ",".join(ids),
           "--stem", "asm", *GENES, *COMMON)  # fmt: skip
    return root


def reports(root: Path) -> list[Path]:
    return [root / f"g{i}" / "asm.run.json" for i in range(len(GROUPS))]


def same_files(merged: Path, direct: Path) -> list[str]:
    """The names of both folders are the same, and every file but the report has the same bytes."""
    names = sorted(p.name for p in direct.iterdir())
    assert sorted(p.name for p in merged.iterdir()) == names
    for name in names:
        if not name.endswith(".run.json"):
            assert (merged / name).read_bytes() == (direct / name).read_bytes(), name
    return names


def test_gene_outputs_gathered_equal_the_whole_run(runs, tmp_path):
    ok("merge", *reports(runs), "-o", tmp_path / "m", "-q")
    names = same_files(tmp_path / "m", runs / "direct")
    assert {"asm.cds.fna", "asm.proteins.faa"} <= set(names)  # FASTA: not indexed
    for name in ("asm.genes.bed", "asm.genes.gtf"):
        assert name in names and f"{name}.gz" in names
    for kind in ("gff3", "genes.bed", "genes.gtf", "CDS.plus.bedgraph"):
        assert f"asm.{kind}.gz.tbi" in names  # every record is short: .tbi, not .csi
    # every group has genes (regression value of this seed: one mRNA on each record), so
    # each file holds pieces of all three groups
    cds = (runs / "direct" / "asm.cds.fna").read_text()
    assert [line.split()[0] for line in cds.splitlines() if line.startswith(">")] == [
        f">gx{i}.mRNA.1" for i in range(1, 5)
    ]
    merged = json.loads((tmp_path / "m" / "asm.run.json").read_text())
    want = json.loads((runs / "direct" / "asm.run.json").read_text())
    assert without_invocation(merged) == without_invocation(want)
    assert merged["outputs"] == names
    for name, sha in merged["output_sha256"].items():  # the gathered files' checksums
        assert hashlib.sha256((tmp_path / "m" / name).read_bytes()).hexdigest() == sha, name
    assert sorted(merged["output_sha256"]) == [n for n in names if n != "asm.run.json"]


def test_indexed_copies_are_made_again_not_copied(runs, tmp_path):
    """The group's GFF3 copy holds its record only; the gathered one every record
    (checked by a tabix query of each record through pysam, a reference library)."""
    ok("merge", *reports(runs), "-o", tmp_path / "m", "-q")
    group = (runs / "g0" / "asm.gff3.gz").read_bytes()
    assert (tmp_path / "m" / "asm.gff3.gz").read_bytes() != group
    with pysam.TabixFile(str(tmp_path / "m" / "asm.gff3.gz")) as tbx:
        assert sorted(tbx.contigs) == ["gx1", "gx2", "gx3", "gx4"]
        plain = (tmp_path / "m" / "asm.gff3").read_text().splitlines()
        for rid in tbx.contigs:
            got = sorted(tbx.fetch(rid))
            assert got == sorted(x for x in plain if x.split("\t")[0] == rid), rid


def test_new_stem_renames_default_names_and_keeps_chosen_ones(runs, tmp_path):
    fasta = runs / "g.fa"
    chosen = ["--cds", "coding.fna", "--proteins", "--tracks", "none", "-m", "gene-segment", "-q"]
    for i, ids in enumerate(GROUPS):
        ok("annotate", fasta, "-o", tmp_path / f"h{i}", "--records", ",".join(ids),
           "--stem", f"part{i}", *chosen)  # fmt: skip
    ok("annotate", fasta, "-o", tmp_path / "direct", "--stem", "whole", *chosen)
    parts = [tmp_path / f"h{i}" / f"part{i}.run.json" for i in range(len(GROUPS))]
    ok("merge", *parts, "-o", tmp_path / "m", "--stem", "whole", "-q")
    names = same_files(tmp_path / "m", tmp_path / "direct")
    assert "coding.fna" in names and "whole.proteins.faa" in names
    merged = json.loads((tmp_path / "m" / "whole.run.json").read_text())
    want = json.loads((tmp_path / "direct" / "whole.run.json").read_text())
    assert merged["options"]["cds"] == "coding.fna"
    assert merged["options"]["proteins"] == "whole.proteins.faa"
    assert without_invocation(merged) == without_invocation(want)


@pytest.mark.parametrize(
    "options, expected",
    [
        (
            ["--proteins", "--gene-formats", "bed12,gtf", "--index-outputs"],
            "was run without --cds and '{first}' with --cds (asm.cds.fna)",
        ),
        (
            ["--cds", "--proteins", "--gene-formats", "gtf", "--index-outputs"],
            "was run with --gene-formats gtf and '{first}' with --gene-formats bed12,gtf",
        ),
        (
            ["--cds", "--proteins", "--gene-formats", "bed12,gtf"],
            "was run without --index-outputs and '{first}' with --index-outputs",
        ),
    ],
    ids=["cds", "gene-formats", "index-outputs"],
)
def test_groups_with_other_gene_outputs_are_refused(runs, tmp_path, options, expected):
    other = tmp_path / "other"
    ok("annotate", runs / "g.fa", "-o", other, "--records", "gx2,gx3", "--stem", "asm",
       *options, *COMMON)  # fmt: skip
    given = reports(runs)
    given[1] = other / "asm.run.json"
    message = one_error(run("merge", *given, "-o", tmp_path / "m"))
    assert f"run report '{other / 'asm.run.json'}' " + expected.format(first=given[0]) in message
    assert "groups must write the same outputs" in message
    assert not (tmp_path / "m").exists()


def test_group_with_an_html_page_is_refused(runs, tmp_path):
    page = tmp_path / "page"
    ok("annotate", runs / "g.fa", "-o", page, "--records", "gx1", "--stem", "asm",
       "--report", "asm.html", *COMMON)  # fmt: skip
    message = one_error(run("merge", page / "asm.run.json", "-o", tmp_path / "m"))
    assert f"run report '{page / 'asm.run.json'}' lists the HTML page 'asm.html' (--report)" in (
        message
    )
    assert "run --report on the whole assembly" in message
    assert not (tmp_path / "m").exists()


def _copy_group(src: Path, dest: Path) -> Path:
    dest.mkdir()
    for p in src.iterdir():
        (dest / p.name).write_bytes(p.read_bytes())
    return dest / "asm.run.json"


def _rewrite(report: Path, name: str, text: str) -> None:
    """Replace a group file and record its new checksum (a consistent but wrong report)."""
    (report.parent / name).write_text(text)
    doc = json.loads(report.read_text())
    doc["output_sha256"][name] = hashlib.sha256(text.encode()).hexdigest()
    report.write_text(json.dumps(doc, indent=2) + "\n")


def test_changed_group_cds_file_is_refused(runs, tmp_path):
    report = _copy_group(runs / "g1", tmp_path / "g1")
    with open(report.parent / "asm.cds.fna", "a") as fh:
        fh.write("ACGT\n")
    given = reports(runs)
    given[1] = report
    message = one_error(run("merge", *given, "-o", tmp_path / "m"), code=1)
    assert str(report.parent / "asm.cds.fna") in message and "SHA-256" in message
    assert "the file changed after the run" in message


@pytest.mark.parametrize(
    "name, text, expected",
    [
        (
            "asm.cds.fna",
            ">gx9.mRNA.1 gene=gx9.gene.1\nACGT\n",
            "line 1: record name 'gx9.mRNA.1', expected ID.mRNA.N on a record of the run report",
        ),
        ("asm.proteins.faa", "", "0 FASTA record(s), expected 2 (the run report's mRNAs"),
        ("asm.cds.fna", "ACGT\n", "line 1: 'ACGT' (a string), expected a FASTA header line"),
        ("asm.genes.bed", "gx2\t0\t10\n", "line 1: 'gx2\\t0\\t10' (a string), expected 12 columns"),
        (
            "asm.genes.gtf",
            "gx2\tseqstate\texon\n",
            "line 1: 'gx2\\tseqstate\\texon' (a string), expected '#gtf-version 2.2'",
        ),
    ],
    ids=["cds-record", "proteins-count", "cds-header", "bed-columns", "gtf-header"],
)
def test_malformed_group_gene_file_is_refused(runs, tmp_path, name, text, expected):
    report = _copy_group(runs / "g1", tmp_path / "g1")
    _rewrite(report, name, text)
    given = reports(runs)
    given[1] = report
    message = one_error(run("merge", *given, "-o", tmp_path / "m"), code=1)
    assert f"{report.parent / name}" in message and expected in message, message
    assert not (tmp_path / "m").exists()


def test_output_names_and_kinds():
    """The helpers that name the gathered outputs (the index kind is compared apart)."""
    assert mo.gathered_name("cds", "a.cds.fna", "a", "b") == "b.cds.fna"
    assert mo.gathered_name("cds", "mine.fna", "a", "b") == "mine.fna"
    assert mo.gathered_name(".gff3", "a.gff3", "a", "b") == "b.gff3"
    assert mo.same_kind(".gff3.gz.tbi") == mo.same_kind(".gff3.gz.csi") != ".gff3.gz"
    assert mo.indexed_bases([".gff3", ".gff3.gz", ".gff3.gz.tbi", ".x.bedgraph.gz"]) == [
        ".gff3",
        ".x.bedgraph",
    ]
    assert [mo.index_kind(b) for b in (".gff3", ".genes.gtf", ".genes.bed", ".x.bedgraph")] == [
        "gff",
        "gff",
        "bed12",
        "bed",
    ]


def test_index_kind_follows_the_whole_set(tmp_path, monkeypatch):
    """A group whose longest record passes the tabix limit has ``.csi`` copies, one
    without has ``.tbi``: the gathered set has the kind of a whole run (``.csi``).  The
    limit is lowered to 25 kb here (it is 2^29 bases) so two sampled records show it."""
    from seqstate.io import indexed

    monkeypatch.setattr(indexed, "CSI_ABOVE", 25000)
    ok("sample", "gene-segment", "--length", 30000, "--records", 1, "--seed", 7,
       "--prefix", "long", "-o", tmp_path / "a.fa")  # fmt: skip
    ok("sample", "gene-segment", "--length", 20000, "--records", 2, "--seed", 8,
       "--prefix", "short", "-o", tmp_path / "b.fa")  # fmt: skip
    fasta = tmp_path / "ab.fa"
    fasta.write_text((tmp_path / "a.fa").read_text() + (tmp_path / "b.fa").read_text())
    opts = ["--stem", "ab", "--gene-formats", "gtf", "--index-outputs", *COMMON]
    ok("annotate", fasta, "-o", tmp_path / "direct", *opts)
    ok("annotate", fasta, "-o", tmp_path / "g0", "--records", "long1", *opts)
    ok("annotate", fasta, "-o", tmp_path / "g1", "--records", "short1,short2", *opts)
    assert (tmp_path / "g0" / "ab.gff3.gz.csi").is_file()
    assert (tmp_path / "g1" / "ab.gff3.gz.tbi").is_file()
    given = [tmp_path / "g1" / "ab.run.json", tmp_path / "g0" / "ab.run.json"]  # reordered
    ok("merge", *given, "-o", tmp_path / "m", "-q")
    names = same_files(tmp_path / "m", tmp_path / "direct")
    assert "ab.gff3.gz.csi" in names and not [n for n in names if n.endswith(".tbi")]
    merged = json.loads((tmp_path / "m" / "ab.run.json").read_text())
    want = json.loads((tmp_path / "direct" / "ab.run.json").read_text())
    assert without_invocation(merged) == without_invocation(want)


def test_force_replaces_the_earlier_set(runs, tmp_path):
    """With --force, a file the earlier run's report lists and this set does not write (a
    page of a whole run) goes with the commit, as annotate --force replaces its set."""
    out = tmp_path / "m"
    ok("annotate", runs / "g.fa", "-o", out, "--stem", "asm", "--report", "asm.html", *GENES,
       *COMMON)  # fmt: skip
    assert (out / "asm.html").is_file()
    ok("merge", *reports(runs), "-o", out, "--force", "-q")
    assert not (out / "asm.html").exists()
    same_files(out, runs / "direct")


@pytest.mark.parametrize(
    "option, value, expected",
    [
        (
            "cds",
            "asm.gff3",
            "'options.cds' is 'asm.gff3' (a string), expected a file name of its own",
        ),
        ("proteins", "asm.cds.fna", "'options.proteins' is 'asm.cds.fna' (a string), expected a"),
        ("cds", "../x.fna", "'options.cds' is '../x.fna' (a string), expected a plain file name"),
    ],
    ids=["an-own-output", "another-option", "a-path"],
)
def test_report_whose_named_output_is_not_its_own_file(runs, tmp_path, option, value, expected):
    report = _copy_group(runs / "g1", tmp_path / "g1")
    doc = json.loads(report.read_text())
    doc["options"][option] = value
    report.write_text(json.dumps(doc, indent=2) + "\n")
    message = one_error(run("merge", report, "-o", tmp_path / "m"), code=1)
    assert message.startswith(f"error: {report}: ") and expected in message, message
