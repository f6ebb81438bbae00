"""``annotate --index-outputs``: sorted, bgzip-compressed, tabix-indexed copies.

Inputs: synthetic records (``seqstate sample``, a fictional organism), annotated by the
gene-segment model (genes on both strands: overlapping features whose lines need
sorting) and the cpg-island model.  References, each named beside its assertion:
pysam 0.24 (``pysam.TabixFile``, htslib's tabix reader), and htslib's ``tabix``
program (Debian package ``tabix``) where it is installed; GenomeTools 1.6
(``gt gff3validator -typecheck so``; a missing ``gt`` fails under ``CI=true`` and is
skipped elsewhere).  The expected answer of every query is worked out from the plain
GFF3 / bedGraph the same run wrote.
"""

from __future__ import annotations

import gzip
import json
import os
import random
import shutil
import signal
import subprocess
import sys
from pathlib import Path

import pysam
import pytest
from click.testing import CliRunner

from seqstate.cli import main
from seqstate.io import indexed

GT = shutil.which("gt")
TABIX = shutil.which("tabix")
IN_CI = os.environ.get("CI", "").strip().lower() in ("true", "1", "yes")


def run(*args: object) -> object:
    return CliRunner().invoke(main, [str(a) for a in args])


def ok(*args: object) -> None:
    result = run(*args)
    assert result.exit_code == 0, result.output


@pytest.fixture(scope="module")
def runs(tmp_path_factory) -> dict[str, Path]:
    root = tmp_path_factory.mktemp("indexed")
    out: dict[str, Path] = {}
    for model, seed in (("gene-segment", 5), ("cpg-island", 3)):
        fasta = root / f"{model}.fa"
        ok("sample", model, "--length", 30000, "--records", 3, "--seed", seed, "-o", fasta, "-q")
        args = ["-m", model, "--stem", "x", "--index-outputs", "-q"]
        if model == "gene-segment":
            args += ["--gene-formats", "bed12,gtf"]
        ok("annotate", fasta, "-o", root / model, *args)
        ok("annotate", fasta, "-o", root / f"{model}.again", *args)
        out[model] = root / model
        out[f"{model}.fasta"] = fasta
    return out


def feature_lines(path: Path) -> list[str]:
    opener = gzip.open if path.suffix == ".gz" else open
    with opener(path, "rt", encoding="utf-8") as fh:
        return [ln for ln in fh.read().splitlines() if ln and not ln.startswith(("#", "track"))]


def test_every_text_output_has_its_indexed_copy_listed_in_the_run_report(runs):
    folder = runs["gene-segment"]
    report = json.loads((folder / "x.run.json").read_text())
    plain = ["x.gff3", "x.genes.bed", "x.genes.gtf"] + [
        n for n in report["outputs"] if n.endswith(".bedgraph")
    ]
    assert len(plain) == 7  # the GFF3, two gene files, four posterior tracks
    for name in plain:
        for extra in (f"{name}.gz", f"{name}.gz.tbi"):
            assert extra in report["outputs"] and extra in report["output_sha256"]
            assert (folder / extra).is_file()
    assert sorted(p.name for p in folder.iterdir()) == sorted(report["outputs"])


def test_indexed_gff3_is_the_plain_one_sorted(runs):
    # the same lines, the header first, each record in FASTA order, by start (stable)
    folder = runs["gene-segment"]
    plain = feature_lines(folder / "x.gff3")
    packed = feature_lines(folder / "x.gff3.gz")
    order = {"sim1": 0, "sim2": 1, "sim3": 2}
    want = sorted(plain, key=lambda ln: (order[ln.split("\t")[0]], int(ln.split("\t")[3])))
    assert packed == want
    with gzip.open(folder / "x.gff3.gz", "rt") as fh:
        head = fh.read().splitlines()[:4]
    assert head[0] == "##gff-version 3" and head[1].startswith("##sequence-region sim1 ")


def test_sorting_is_by_record_order_then_start_and_stable(tmp_path):
    # lines out of start order (a minus-strand gene starting inside a plus-strand one)
    # and records in the ##sequence-region order, not by name; ties keep file order
    src, dest = tmp_path / "in.gff3", tmp_path / "out.gff3"
    rows = [
        ("zz", "gene", 100, 900),
        ("zz", "mRNA", 100, 900),
        ("zz", "CDS", 700, 900),
        ("zz", "gene", 300, 500),
        ("zz", "mRNA", 300, 500),
        ("zz", "CDS", 300, 500),
        ("aa", "gene", 50, 60),
    ]
    head = "##gff-version 3\n##sequence-region zz 1 1000\n##sequence-region aa 1 1000\n# c\n"
    body = [f"{s}\tt\t{t}\t{a}\t{b}\t.\t+\t.\tID=i{k}\n" for k, (s, t, a, b) in enumerate(rows)]
    src.write_text(head + "".join(body))
    indexed.sort_gff_lines(src, dest)
    assert dest.read_text() == head + "".join(body[i] for i in (0, 1, 3, 4, 5, 2, 6))
    # records in one block each keep the file's order; a record whose lines come back
    # after another's is sorted whole, records in ##sequence-region order
    src.write_text(head + "".join(body[i] for i in (6, 0, 1, 2, 3, 4, 5)))
    indexed.sort_gff_lines(src, dest)
    assert dest.read_text() == head + "".join(body[i] for i in (6, 0, 1, 3, 4, 5, 2))
    src.write_text(head + "".join(body[i] for i in (0, 1, 6, 2, 3, 4, 5)))
    indexed.sort_gff_lines(src, dest)
    assert dest.read_text() == head + "".join(body[i] for i in (0, 1, 3, 4, 5, 2, 6))


def overlapping(lines: list[str], seqid: str, start0: int, end0: int, zero: bool) -> list[str]:
    """Lines on ``seqid`` overlapping 0-based half-open ``start0 .. end0``: the answer a
    tabix query must give, from the plain file."""
    out = []
    for ln in lines:
        cols = ln.split("\t")
        a, b = (int(cols[1]), int(cols[2])) if zero else (int(cols[3]) - 1, int(cols[4]))
        if cols[0] == seqid and a < end0 and b > start0:
            out.append(ln)
    return out


CASES = [
    ("gene-segment", "x.gff3", False),
    ("gene-segment", "x.genes.gtf", False),
    ("gene-segment", "x.genes.bed", True),
    ("gene-segment", "x.CDS.minus.bedgraph", True),
    ("cpg-island", "x.gff3", False),
    ("cpg-island", "x.CpG_island.bedgraph", True),
]


@pytest.mark.parametrize("model, name, zero", CASES)
def test_tabix_queries_return_exactly_the_overlapping_lines(runs, model, name, zero):
    # reference: pysam.TabixFile (htslib) on the .gz + .tbi; expected from the plain file
    folder = runs[model]
    lines = feature_lines(folder / name)
    rng = random.Random(23)
    hits = 0
    with pysam.TabixFile(str(folder / f"{name}.gz"), index=str(folder / f"{name}.gz.tbi")) as tb:
        assert sorted(tb.contigs) == sorted({ln.split("\t")[0] for ln in lines})
        for _ in range(150):
            seqid = rng.choice(["sim1", "sim2", "sim3"])
            start0 = rng.randrange(0, 30000)
            end0 = min(30000, start0 + rng.choice([1, 10, 500, 5000, 20000]))
            want = overlapping(lines, seqid, start0, end0, zero)
            got = list(tb.fetch(seqid, start0, end0)) if seqid in tb.contigs else []
            assert sorted(got) == sorted(want), (seqid, start0, end0)
            hits += bool(want)
    assert hits >= 10  # the queries meet features, not only empty stretches


@pytest.mark.skipif(
    TABIX is None and not IN_CI, reason="htslib's tabix program is not installed"
)  # in CI a missing tabix fails: .ci/run installs it
def test_tabix_program_agrees(runs):
    # reference: htslib's tabix program (Debian package tabix), 1-based closed regions
    folder = runs["gene-segment"]
    lines = feature_lines(folder / "x.gff3")
    for seqid, a1, b1 in (("sim1", 9000, 10000), ("sim1", 26000, 26700), ("sim2", 1, 30000)):
        res = subprocess.run(
            [str(TABIX), str(folder / "x.gff3.gz"), f"{seqid}:{a1}-{b1}"],
            capture_output=True,
            text=True,
            check=True,
        )
        assert sorted(res.stdout.splitlines()) == sorted(
            overlapping(lines, seqid, a1 - 1, b1, False)
        )


def test_indexed_outputs_are_byte_identical_on_rerun(runs):
    for model in ("gene-segment", "cpg-island"):
        first, again = runs[model], runs[model].parent / f"{model}.again"
        names = sorted(p.name for p in first.iterdir() if ".gz" in p.name)
        assert names and names == sorted(p.name for p in again.iterdir() if ".gz" in p.name)
        for name in names:
            assert (first / name).read_bytes() == (again / name).read_bytes(), name


@pytest.mark.skipif(GT is None and not IN_CI, reason="GenomeTools' gt is not installed")
def test_sorted_gff3_passes_gt_gff3validator(runs, tmp_path):
    # GenomeTools 1.6 (Gremme, Steinbiss and Kurtz 2013): the sorted copy is valid GFF3
    assert GT is not None, "CI: GenomeTools' gt is missing (.ci/run installs genometools)"
    for model in ("gene-segment", "cpg-island"):
        copy = tmp_path / f"{model}.gff3"
        with gzip.open(runs[model] / "x.gff3.gz", "rb") as fh:
            copy.write_bytes(fh.read())
        res = subprocess.run([GT, "gff3validator", "-typecheck", "so", str(copy)],
                             capture_output=True, text=True, check=False)  # fmt: skip
        assert res.returncode == 0, res.stderr


def test_a_record_past_512_mbp_gets_a_csi_index(tmp_path):
    # a tabix (.tbi) index addresses 2^29 bases; past that the CSI index (htslib)
    assert indexed.index_suffix(1 << 29) == ".tbi"
    assert indexed.index_suffix((1 << 29) + 1) == ".csi"
    big = 600_000_000
    rows = [("big", p, p + 99) for p in (5, 300_000_000, 536_870_900, 599_999_000)]
    rows += [("small", 10, 20)]
    text = "##gff-version 3\n##sequence-region big 1 600000000\n##sequence-region small 1 100\n"
    text += "".join(f"{s}\tt\tregion_x\t{a}\t{b}\t.\t+\t.\tID=f{a}\n" for s, a, b in rows)
    src = tmp_path / "big.gff3"
    src.write_text(text)
    assert indexed._longest_end(src) == big
    gz, csi = tmp_path / "big.gff3.gz", tmp_path / "big.gff3.gz.csi"
    indexed.indexed_copy(src, gz, csi, "gff", tmp_path)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["big.gff3", "big.gff3.gz", csi.name]
    with pysam.TabixFile(str(gz), index=str(csi)) as tb:
        got = [ln.split("\t")[3] for ln in tb.fetch("big", 536_870_950, 536_871_000)]
        assert got == ["536870900"]
        assert len(list(tb.fetch("big", 0, big))) == 4


def test_index_outputs_needs_force_for_an_existing_index(runs, tmp_path):
    out = tmp_path / "o"
    out.mkdir()
    (out / "x.gff3.gz.tbi").write_bytes(b"old")
    fasta = runs["cpg-island.fasta"]
    result = run("annotate", fasta, "-o", out, "--stem", "x", "--index-outputs", "-q")
    assert result.exit_code == 2
    assert result.output.strip().splitlines() == [
        f"error: output '{out}/x.gff3.gz.tbi' already exists: use --force to replace it"
    ]
    assert sorted(p.name for p in out.iterdir()) == ["x.gff3.gz.tbi"]
    ok("annotate", fasta, "-o", out, "--stem", "x", "--index-outputs", "--force", "-q")
    assert (out / "x.gff3.gz.tbi").read_bytes() == (
        runs["cpg-island"] / "x.gff3.gz.tbi"
    ).read_bytes()


def test_force_without_the_option_removes_the_earlier_indexed_copies(runs, tmp_path):
    out = tmp_path / "o"
    shutil.copytree(runs["cpg-island"], out)
    ok("annotate", runs["cpg-island.fasta"], "-o", out, "--stem", "x", "--force", "-q")
    assert not [p.name for p in out.iterdir() if ".gz" in p.name]
    assert not [p.name for p in out.iterdir() if p.name.startswith(".")]


def test_a_failing_index_leaves_no_output(runs, tmp_path, monkeypatch):
    def broken(*args: object) -> None:
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(indexed, "indexed_copy", broken)
    out = tmp_path / "o"
    result = run("annotate", runs["cpg-island.fasta"], "-o", out, "--index-outputs", "-q")
    assert result.exit_code != 0
    lines = result.output.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: ") and "No space left" in lines[0]
    assert not out.exists() or not list(out.iterdir())


def test_index_outputs_with_stdout_is_an_error(runs):
    result = run("annotate", runs["cpg-island.fasta"], "-o", "-", "--index-outputs")
    assert result.exit_code == 2
    assert result.output.strip().splitlines() == [
        "error: --index-outputs needs an output folder (not -o -)"
    ]


def test_index_outputs_without_pysam_is_one_error_line(runs, tmp_path, monkeypatch):
    monkeypatch.setitem(sys.modules, "pysam", None)  # import pysam raises ImportError
    out = tmp_path / "o"
    result = run("annotate", runs["cpg-island.fasta"], "-o", out, "--index-outputs", "-q")
    assert result.exit_code == 3
    assert result.output.strip().splitlines() == [
        "error: --index-outputs needs the optional extra: pip install 'seqstate[index]' (pysam)"
    ]
    assert not out.exists()


def test_a_stop_signal_at_the_commit_leaves_the_earlier_set(runs, tmp_path, held_run):
    # held once every file (the indexed copies too) is staged, just before the commit
    out = tmp_path / "o"
    shutil.copytree(runs["cpg-island"], out)
    before = {p.name: p.read_bytes() for p in out.iterdir()}
    args = ["annotate", runs["cpg-island.fasta"], "-o", out, "--stem", "x", "--force"]
    proc = held_run([*args, "--index-outputs", "--precision", "2", "-q"], "commit")
    staged = [p for p in out.iterdir() if p.name.startswith(".seqstate-stage-")]
    assert staged and (staged[0] / "x.gff3.gz.tbi").is_file()
    proc.send_signal(signal.SIGTERM)
    _, err = proc.communicate(timeout=120)
    assert proc.returncode == 130, err
    assert {p.name: p.read_bytes() for p in out.iterdir()} == before
