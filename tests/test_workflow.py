"""The Snakemake workflow (workflow/): many assemblies, scattered and gathered.

The gathered outputs are compared with seqstate's own whole-file ``seqstate annotate``
of each assembly (byte for byte; the run report field by field, see
seqstate/commands/merge.py for the fields that describe the invocation).  The FASTA
index stand-in is compared with pyfaidx (a reference library for the shared .fai
layout).  Assemblies: the bundled synthetic demo and two synthetic assemblies drawn
here by ``seqstate sample`` (a fictional organism; not real data).
"""

from __future__ import annotations

import csv
import importlib.util
import json
import os
import shlex
import subprocess
import sys
from pathlib import Path

import pytest
from click.testing import CliRunner

from seqstate.cli import main

# the test extra installs snakemake on Python 3.11 and later (snakemake 9 needs it)
pytestmark = pytest.mark.skipif(sys.version_info < (3, 11), reason="snakemake 9 needs 3.11")

REPO = Path(__file__).resolve().parent.parent
WORKFLOW = REPO / "workflow"
sys.path.insert(0, str(WORKFLOW / "scripts"))
import index_fasta  # noqa: E402
import split_groups  # noqa: E402
from sheet import SheetError, read_sheet  # noqa: E402

SEQSTATE = [sys.executable, "-m", "seqstate.cli"]
OUTPUT_SUFFIXES = (
    ".gff3",
    ".features.tsv",
    ".records.tsv",
    ".CpG_island.bedgraph",
    ".run.json",
    ".fai",
)


def env() -> dict[str, str]:
    out = dict(os.environ)
    out["PYTHONPATH"] = os.pathsep.join([str(REPO), out.get("PYTHONPATH", "")]).rstrip(os.pathsep)
    return out


def seqstate(*args: object) -> None:
    """seqstate in this process (its compiled kernels are loaded once)."""
    result = CliRunner().invoke(main, [str(a) for a in args])
    assert result.exit_code == 0, result.output


def snakemake(
    workdir: Path, sheet: Path, *extra: str, config: tuple[str, ...] = ()
) -> subprocess.CompletedProcess:
    command = [
        sys.executable, "-m", "snakemake",
        "-s", str(WORKFLOW / "Snakefile"),
        "--configfile", str(WORKFLOW / "config.yaml"),
        "--directory", str(workdir),
        "--cores", "2",
        "--config", f"samples={sheet}",
        "seqstate=" + " ".join(shlex.quote(p) for p in SEQSTATE),
        "scatter={'group_bases': 100000, 'max_groups': 3}",
        *config,
        *extra,
    ]  # fmt: skip
    return subprocess.run(command, env=env(), capture_output=True, text=True, timeout=600)


# ---------------------------------------------------------------- helper scripts


def test_index_stand_in_matches_pyfaidx(tmp_path):
    """The 5-column .fai of the stand-in equals pyfaidx's (reference library), line widths too."""
    pyfaidx = pytest.importorskip("pyfaidx")
    fasta = tmp_path / "x.fa"
    fasta.write_text(">a desc\nACGTACGTAC\nACGTACGTAC\nACG\n>b\nAC\n>c\nACGTACGTACGT\nAC\n")
    ours = tmp_path / "ours.fai"
    assert index_fasta.main([str(fasta), str(ours)]) == 0
    pyfaidx.Faidx(str(fasta))  # writes x.fa.fai beside it
    assert ours.read_text() == (tmp_path / "x.fa.fai").read_text()


def test_index_stand_in_refuses_ragged_lines(tmp_path, capsys):
    fasta = tmp_path / "x.fa"
    fasta.write_text(">a\nACGT\nAC\nACGT\n")
    assert index_fasta.main([str(fasta), str(tmp_path / "x.fai")]) == 1
    err = capsys.readouterr().err.strip()
    assert err.startswith("error: ") and "line 4" in err and "record 'a'" in err
    assert not list(tmp_path.glob("x.fai*"))


@pytest.mark.parametrize(
    "lengths, group_bases, max_groups, expected",
    [
        ([10] * 6, 20, 10, [[0, 1], [2, 3], [4, 5]]),
        ([10] * 6, 1000, 10, [[0, 1, 2, 3, 4, 5]]),
        ([50, 10, 10, 10, 10, 10], 50, 10, [[0], [1, 2, 3, 4, 5]]),
        ([10, 0, 0, 10], 5, 10, [[0], [1, 2, 3]]),  # empty records go with the next record
        ([10] * 9, 1, 3, [[0, 1, 2], [3, 4, 5], [6, 7, 8]]),
    ],
)
def test_split_groups(lengths, group_bases, max_groups, expected):
    records = [(f"r{i}", n) for i, n in enumerate(lengths)]
    groups = split_groups.split(records, group_bases, max_groups)
    assert groups == [[f"r{i}" for i in g] for g in expected]


def test_split_groups_near_equal_totals():
    """Consecutive groups, in order, each within one record of an equal share."""
    lengths = [7, 3, 12, 5, 5, 9, 1, 1, 8, 4, 6, 2]
    records = [(f"r{i}", n) for i, n in enumerate(lengths)]
    groups = split_groups.split(records, 16, 4)
    assert [rid for g in groups for rid in g] == [rid for rid, _ in records]
    share = sum(lengths) / 4
    size = dict(records)
    assert len(groups) == 4
    for g in groups:
        assert abs(sum(size[r] for r in g) - share) <= max(lengths)


# ---------------------------------------------------------------- the sample sheet


def write(path: Path, text: str) -> Path:
    path.write_text(text)
    return path


@pytest.mark.parametrize(
    "rows, message",
    [
        ("assembly\tfasta\nx\ta.fa\n", "line 1: the header has no column 'model'"),
        ("assembly\tfasta\tmodel\nx\tnone.fa\t\n", "line 2 (assembly 'x'): FASTA"),
        (
            "assembly\tfasta\tmodel\nx\ta.fa\t\n# note\ny\ta.fa\t\nx\ta.fa\t\n",
            "line 5 (assembly 'x'): duplicate assembly name (first on line 2)",
        ),
        ("assembly\tfasta\tmodel\nx y\ta.fa\t\n", "line 2 (assembly 'x y'): the assembly name"),
        ("assembly\tfasta\tmodel\n\ta.fa\t\n", "line 2: the 'assembly' cell is empty"),
        ("assembly\tfasta\tmodel\treference\nx\ta.fa\t\tr.gff3\n", "reference"),
        (
            "assembly\tfasta\tmodel\tcds\nx\ta.fa\t\tmaybe\n",
            "line 2 (assembly 'x'): the 'cds' cell is 'maybe', expected yes or no",
        ),
        (
            "assembly\tfasta\tmodel\tgene_formats\nx\ta.fa\t\tgtf,gtf\n",
            "line 2 (assembly 'x'): the 'gene_formats' cell is 'gtf,gtf', expected bed12, gtf, "
            "bed12,gtf or none",
        ),
    ],
)
def test_sheet_errors(tmp_path, rows, message):
    write(tmp_path / "a.fa", ">a\nACGT\n")
    with pytest.raises(SheetError) as info:
        read_sheet(write(tmp_path / "s.tsv", rows))
    assert message in str(info.value)


def test_sheet_resolves_paths_from_its_folder(tmp_path):
    (tmp_path / "sub").mkdir()
    write(tmp_path / "a.fa", ">a\nACGT\n")
    sheet = write(tmp_path / "sub" / "s.tsv", "fasta\tassembly\tmodel\n../a.fa\tx\t\n")
    (row,) = read_sheet(sheet, default_model="casino")
    assert Path(row.fasta).resolve() == (tmp_path / "a.fa").resolve()
    assert row.model == "casino" and row.reference is None and row.line == 2


def test_sheet_gene_output_cells(tmp_path):
    """cds, proteins, report: yes / no per row; an empty cell or no column is the default."""
    write(tmp_path / "a.fa", ">a\nACGT\n")
    sheet = write(
        tmp_path / "s.tsv",
        "assembly\tfasta\tmodel\tcds\treport\nx\ta.fa\t\tYes\t0\ny\ta.fa\t\t\tfalse\n",
    )
    x, y = read_sheet(sheet)
    assert x.outputs == {"cds": True, "proteins": None, "report": False}
    assert y.outputs == {"cds": None, "proteins": None, "report": False}
    assert x.wants("cds", False) and not x.wants("report", True) and x.wants("proteins", True)
    assert y.wants("cds", True) and not y.wants("cds", False)


def test_sheet_gene_formats_cells(tmp_path):
    """gene_formats: the formats, none (no format) or empty (None: the config's)."""
    write(tmp_path / "a.fa", ">a\nACGT\n")
    sheet = write(
        tmp_path / "s.tsv",
        "assembly\tfasta\tmodel\tgene_formats\nx\ta.fa\t\tgtf,bed12\ny\ta.fa\t\tNone\n"
        "z\ta.fa\t\t\n",
    )
    x, y, z = read_sheet(sheet)
    assert (x.gene_formats, y.gene_formats, z.gene_formats) == (("gtf", "bed12"), (), None)


# ---------------------------------------------------------------- the workflow end to end


@pytest.fixture(scope="module")
def project(tmp_path_factory):
    """Three assemblies, a sample sheet and one workflow run (returns its folders)."""
    root = tmp_path_factory.mktemp("wf")
    data = root / "data"
    data.mkdir()
    # "big": 2 x 80 kb + 6 x 20 kb (280 kb, scattered into 3 groups); "small": 2 x 15 kb
    seqstate("sample", "cpg-island", "--length", 80000, "--records", 2, "--seed", 11,
             "--prefix", "bigA", "-o", data / "a.fa")  # fmt: skip
    seqstate("sample", "cpg-island", "--length", 20000, "--records", 6, "--seed", 12,
             "--prefix", "bigB", "-o", data / "b.fa")  # fmt: skip
    (data / "big.fa").write_text((data / "a.fa").read_text() + (data / "b.fa").read_text())
    seqstate("sample", "cpg-island", "--length", 15000, "--records", 2, "--seed", 13,
             "--prefix", "smol", "-o", data / "small.fa")  # fmt: skip
    demo = REPO / "examples"
    sheet = write(
        data / "samples.tsv",
        "assembly\tfasta\tmodel\treference\n"
        f"cex_draft1\t{demo / 'cex_draft1.fa.gz'}\tcpg-island\t{demo / 'cex_draft1.truth.gff3'}\n"
        "big\tbig.fa\t\t\n"
        "small\tsmall.fa\tcpg-island\t\n",
    )
    work = root / "work"
    result = snakemake(work, sheet)
    assert result.returncode == 0, result.stderr[-3000:]
    return {"root": root, "data": data, "sheet": sheet, "work": work}


ASSEMBLIES = ("cex_draft1", "big", "small")


def test_every_output_exists(project):
    results = project["work"] / "results"
    for asm in ASSEMBLIES:
        for suffix in OUTPUT_SUFFIXES:
            assert (results / asm / f"{asm}{suffix}").is_file(), (asm, suffix)
        assert not (results / asm / "groups").exists() or not any(
            (results / asm / "groups").iterdir()
        )  # per-group outputs are removed once gathered
    assert (results / "cex_draft1" / "cex_draft1.compare.json").is_file()
    assert not (results / "big" / "big.compare.json").exists()
    assert (results / "summary.tsv").is_file()


def test_big_assembly_was_scattered_in_order(project):
    results = project["work"] / "results" / "big"
    groups = sorted((results / "groups.d").glob("g*.txt"))
    assert len(groups) == 3
    ids = [line for g in groups for line in g.read_text().split()]
    fai = [line.split("\t")[0] for line in (results / "big.fai").read_text().splitlines()]
    assert ids == fai == ["bigA1", "bigA2"] + [f"bigB{i}" for i in range(1, 7)]
    assert len(sorted((project["work"] / "results" / "small" / "groups.d").glob("*.txt"))) == 1


@pytest.mark.parametrize("asm", ASSEMBLIES)
def test_gathered_outputs_equal_a_direct_run(project, tmp_path, asm):
    results = project["work"] / "results" / asm
    report = json.loads((results / f"{asm}.run.json").read_text())
    fasta = report["options"]["input"]  # the path the workflow gave seqstate
    direct = tmp_path / "direct"
    seqstate("annotate", fasta, "-o", direct, "--stem", asm, "-q")
    names = sorted(p.name for p in direct.iterdir())
    assert names == sorted(f"{asm}{s}" for s in OUTPUT_SUFFIXES if s != ".fai")
    for name in names:
        if not name.endswith(".run.json"):
            assert (results / name).read_bytes() == (direct / name).read_bytes(), name
    want = json.loads((direct / f"{asm}.run.json").read_text())
    for r in (report, want):
        r.pop("command_line")
        r["options"].pop("out_dir"), r["options"].pop("force")
    assert report == want
    if asm == "cex_draft1":  # the demo's islands (examples/README.md: ten are found)
        assert report["records"] and sum(r["features"] for r in report["records"]) == 10


def test_summary_table(project):
    results = project["work"] / "results"
    with open(results / "summary.tsv", newline="") as fh:
        rows = list(csv.DictReader(fh, delimiter="\t"))
    assert [r["assembly"] for r in rows] == list(ASSEMBLIES)  # one feature type each
    for row in rows:
        asm = row["assembly"]
        report = json.loads((results / asm / f"{asm}.run.json").read_text())
        with open(results / asm / f"{asm}.features.tsv", newline="") as fh:
            feats = list(csv.DictReader(fh, delimiter="\t"))
        assert int(row["features"]) == len(feats) == sum(r["features"] for r in report["records"])
        assert row["model_sha256"] == report["model"]["sha256"]
        assert row["seqstate_version"] == report["version"]
        assert int(row["records"]) == len(report["records"]) == report["totals"]["records"]
        assert int(row["total_bases"]) == sum(r["length"] for r in report["records"])
        assert int(row["total_bases"]) == report["totals"]["bases"]
        if feats:
            bases = sum(int(f["length"]) for f in feats)
            weighted = sum(float(f["mean_posterior"]) * int(f["length"]) for f in feats)
            assert row["feature_bases"] == str(bases)
            assert row["mean_posterior"] == f"{weighted / bases:.4f}"
    demo = rows[0]
    compare = json.loads((results / "cex_draft1" / "cex_draft1.compare.json").read_text())
    sn = compare["nucleotide"]["strand_aware"]["sensitivity"]
    assert demo["type"] == "CpG_island" and demo["nucleotide_sensitivity"] == f"{sn:.4f}"
    # islands are compared by overlap: no exon or gene figures
    assert [
        demo[f"{level}_{m}"] for level in ("exon", "gene") for m in ("sensitivity", "specificity")
    ] == ["NA"] * 4
    assert rows[2]["nucleotide_sensitivity"] == "NA"  # no reference for "small"


def test_rerun_does_nothing_and_a_changed_input_reruns_one_assembly(project):
    work, sheet = project["work"], project["sheet"]
    dry = snakemake(work, sheet, "-n")
    assert dry.returncode == 0, dry.stderr[-2000:]
    assert "Nothing to be done" in dry.stdout + dry.stderr
    results = work / "results"
    outputs = [p for p in results.rglob("*") if p.is_file() and ".snakemake" not in p.name]
    before = {p: p.stat().st_mtime_ns for p in outputs}
    # A changed input: Snakemake compares the content of small inputs (a checksum), so the
    # FASTA is redrawn with another seed (a bare touch of a small file re-runs nothing).
    seqstate("sample", "cpg-island", "--length", 15000, "--records", 2, "--seed", 14,
             "--prefix", "smol", "-o", project["data"] / "small.fa", "--force")  # fmt: skip
    result = snakemake(work, sheet)
    assert result.returncode == 0, result.stderr[-3000:]
    changed = {
        p.relative_to(results).as_posix()
        for p in outputs
        if not p.exists() or p.stat().st_mtime_ns != before[p]
    }
    assert changed >= {"small/small.gff3", "small/small.run.json", "summary.tsv"}
    assert {c.split("/")[0] for c in changed} == {"small", "summary.tsv"}
    test_gathered_outputs_equal_a_direct_run(project, work / "check", "small")


@pytest.mark.parametrize(
    "rows, expected",
    [
        ("assembly\tfasta\nsmall\tsmall.fa\n", "line 1: the header has no column 'model'"),
        (
            "assembly\tfasta\tmodel\nsmall\tsmall.fa\t\nlost\tnot-there.fa\t\n",
            "line 3 (assembly 'lost'): FASTA",
        ),
        (
            "assembly\tfasta\tmodel\nsmall\tsmall.fa\t\nsmall\tbig.fa\t\n",
            "line 3 (assembly 'small'): duplicate assembly name (first on line 2)",
        ),
    ],
)
def test_bad_sheet_fails_before_any_job(project, tmp_path, rows, expected):
    sheet = write(project["data"] / "bad.tsv", rows)
    work = tmp_path / "work"
    result = snakemake(work, sheet)
    assert result.returncode != 0
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: sample sheet"), result.stderr
    assert expected in lines[0]
    assert not (work / "results").exists()


def test_fit_first_annotates_with_the_fitted_model(project):
    """With fit enabled, each assembly's model is fitted first and annotate uses it (dry run)."""
    result = snakemake(
        project["work"], project["sheet"], "-n", "-p",
        config=("fit={'enabled': True, 'method': 'em', 'max_iter': 2}",),
    )  # fmt: skip
    assert result.returncode == 0, result.stderr[-2000:]
    text = result.stdout + result.stderr
    for asm in ASSEMBLIES:
        assert f"-o results/{asm}/model --name {asm}-fitted" in text
        assert f"-m results/{asm}/model --records-file" in text
    assert "--em --max-iter 2" in text


def test_snakemake_is_importable():
    """snakemake is in the test extra (pyproject.toml), so this test cannot be skipped."""
    assert importlib.util.find_spec("snakemake") is not None


# ---------------------------------------------------------------- gene outputs


@pytest.fixture(scope="module")
def gene_project(tmp_path_factory):
    """A gene-model assembly with its synthetic truth (``seqstate sample --truth``) that asks
    for the CDS and proteins in the sample sheet (scattered into two groups), the same FASTA
    with the HTML page (the config's report: annotated whole) and a CpG-island assembly;
    the config asks for the BED12 and GTF gene files and the indexed copies of every one."""
    root = tmp_path_factory.mktemp("wf-genes")
    data = root / "data"
    data.mkdir()
    seqstate("sample", "gene-segment", "--length", 30000, "--records", 5, "--seed", 5,
             "--prefix", "gx", "-o", data / "g.fa", "--truth", data / "g.truth.gff3")  # fmt: skip
    seqstate("sample", "cpg-island", "--length", 15000, "--records", 2, "--seed", 13,
             "--prefix", "smol", "-o", data / "small.fa")  # fmt: skip
    sheet = write(
        data / "samples.tsv",
        "assembly\tfasta\tmodel\treference\tcds\tproteins\treport\tgene_formats\n"
        "genes\tg.fa\tgene-segment\tg.truth.gff3\tyes\tyes\tno\t\n"
        "paged\tg.fa\tgene-segment\t\tyes\t\t\tgtf\n"
        "small\tsmall.fa\tcpg-island\t\t\t\tno\tnone\n",
    )
    work = root / "work"
    config = (
        "annotate={'report': True, 'tracks': 'bedgraph', 'gene_formats': 'bed12,gtf', "
        "'index_outputs': True}"
    )
    result = snakemake(work, sheet, config=(config,))
    assert result.returncode == 0, result.stderr[-3000:]
    return {"data": data, "sheet": sheet, "work": work}


def _same_as_direct(results: Path, direct: Path) -> list[str]:
    """Both folders hold the same names (but the workflow's own files), and every file
    but the run report has the same bytes; the reports differ only in how they were run."""
    names = sorted(p.name for p in direct.iterdir())
    ours = {p.name for p in results.iterdir() if p.is_file() and not p.name.endswith(
        (".fai", ".compare.json"))}  # fmt: skip
    assert sorted(ours) == names
    for name in names:
        if not name.endswith(".run.json"):
            assert (results / name).read_bytes() == (direct / name).read_bytes(), name
    stem = results.name
    report = json.loads((results / f"{stem}.run.json").read_text())
    want = json.loads((direct / f"{stem}.run.json").read_text())
    for r in (report, want):
        r.pop("command_line"), r["options"].pop("out_dir"), r["options"].pop("force")
    assert report == want
    return names


def test_gene_outputs_are_scattered_and_gathered(gene_project, tmp_path):
    """The assembly with CDS and proteins (no page) is scattered like the others: its
    gathered files (the FASTA, BED12, GTF and the bgzip/tabix copies too) equal one
    ``seqstate annotate`` of the whole FASTA with the same options, byte for byte."""
    results = gene_project["work"] / "results" / "genes"
    assert len(list((results / "groups.d").glob("g*.txt"))) == 2  # 150 kb in 100 kb groups
    report = json.loads((results / "genes.run.json").read_text())
    direct = tmp_path / "direct"
    seqstate("annotate", report["options"]["input"], "-m", "gene-segment", "-o", direct,
             "--stem", "genes", "--cds", "genes.cds.fna", "--proteins", "genes.proteins.faa",
             "--gene-formats", "bed12,gtf", "--index-outputs", "--tracks", "bedgraph",
             "-q")  # fmt: skip
    names = _same_as_direct(results, direct)
    for name in ("genes.cds.fna", "genes.proteins.faa", "genes.genes.bed", "genes.genes.gtf",
                 "genes.gff3.gz", "genes.gff3.gz.tbi", "genes.genes.gtf.gz.tbi"):  # fmt: skip
        assert name in names, name
    # both groups have genes: the gathered CDS file holds records of each
    groups = [g.read_text().split() for g in sorted((results / "groups.d").glob("g*.txt"))]
    cds = (results / "genes.cds.fna").read_text()
    on = {line[1:].split(".mRNA.")[0] for line in cds.splitlines() if line.startswith(">")}
    assert all(on & set(g) for g in groups), (on, groups)


def test_page_assembly_is_annotated_whole(gene_project, tmp_path, monkeypatch):
    """The assembly with the HTML page is annotated whole: the same files, byte for byte,
    as one ``seqstate annotate --cds --report --gene-formats gtf --index-outputs`` into the
    same relative folder with --force (the page shows both); the run report differs only in
    its command line."""
    results = gene_project["work"] / "results" / "paged"
    assert not (results / "groups.d").exists()  # not scattered
    report = json.loads((results / "paged.run.json").read_text())
    monkeypatch.chdir(tmp_path)
    seqstate("annotate", report["options"]["input"], "-m", "gene-segment", "-o", "results/paged",
             "--stem", "paged", "--cds", "paged.cds.fna", "--report", "paged.report.html",
             "--gene-formats", "gtf", "--index-outputs", "--tracks", "bedgraph", "--jobs", 2,
             "--force", "-q")  # fmt: skip
    direct = tmp_path / "results" / "paged"
    names = _same_as_direct(results, direct)
    assert {"paged.cds.fna", "paged.report.html", "paged.genes.gtf"} <= set(names)
    assert "paged.proteins.faa" not in names and "paged.genes.bed" not in names
    want = json.loads((direct / "paged.run.json").read_text())
    assert report["options"] == want["options"]  # the same folder and --force


def test_cpg_assembly_writes_no_gene_files(gene_project):
    """The sheet says no to the config's page and its gene formats; the indexed copies of
    the config apply to every assembly."""
    small = gene_project["work"] / "results" / "small"
    assert (small / "groups.d").is_dir()
    assert not list(small.glob("*.html")) and not list(small.glob("*.f?a"))
    assert not list(small.glob("*.genes.*"))
    assert (small / "small.gff3.gz.tbi").is_file()
    assert (small / "small.CpG_island.bedgraph.gz").is_file()


def test_gene_and_exon_accuracy_in_the_summary(gene_project):
    """The CDS row of an assembly with a reference has the exon- and gene-level figures of
    its `seqstate compare` report; rows of other types and assemblies have NA."""
    results = gene_project["work"] / "results"
    compare = json.loads((results / "genes" / "genes.compare.json").read_text())
    assert compare["type"] == "CDS" and compare["rule"] == "exon"
    with open(results / "summary.tsv", newline="") as fh:
        rows = list(csv.DictReader(fh, delimiter="\t"))
    (cds,) = [r for r in rows if r["assembly"] == "genes" and r["type"] == "CDS"]
    assert cds["exon_sensitivity"] == f"{compare['feature']['sensitivity']:.4f}"
    assert cds["exon_specificity"] == f"{compare['feature']['specificity']:.4f}"
    assert cds["gene_sensitivity"] == f"{compare['gene']['sensitivity']:.4f}"
    assert cds["gene_specificity"] == f"{compare['gene']['specificity']:.4f}"
    # the figures are counts over the sampled truth's genes: a fraction with that denominator
    genes = compare["counts"]["gene"]
    assert genes["reference"] > 0
    assert float(cds["gene_sensitivity"]) == pytest.approx(
        genes["matched_reference"] / genes["reference"], abs=5e-5
    )
    others = [r for r in rows if r is not cds]
    assert {r["type"] for r in others if r["assembly"] == "genes"} >= {"gene", "mRNA"}
    for r in others:
        assert r["exon_sensitivity"] == r["gene_specificity"] == "NA", r


@pytest.mark.parametrize(
    "config, expected",
    [
        ("annotate={'cds': 'maybe'}", "config annotate.cds is 'maybe', expected true or false"),
        (
            "annotate={'index_outputs': 'maybe'}",
            "config annotate.index_outputs is 'maybe', expected true or false",
        ),
        (
            "annotate={'gene_formats': 'bed12,gff'}",
            "config annotate.gene_formats is 'bed12,gff', expected null or one or both of "
            "bed12, gtf (comma-separated or a list)",
        ),
    ],
    ids=["cds", "index_outputs", "gene_formats"],
)
def test_bad_gene_output_key_fails_before_any_job(gene_project, tmp_path, config, expected):
    work = tmp_path / "work"
    result = snakemake(work, gene_project["sheet"], config=(config,))
    assert result.returncode != 0
    lines = result.stderr.strip().splitlines()
    assert lines == [f"error: {expected}"], result.stderr
    assert not (work / "results").exists()
