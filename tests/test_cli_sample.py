"""``seqstate sample``: reproducible synthetic records and their true labelled runs."""

from __future__ import annotations

import itertools
from pathlib import Path

import numpy as np
import pytest
from Bio import SeqIO
from click.testing import CliRunner
from golden_util import DATA

from seqstate.cli import main
from seqstate.engine import api
from seqstate.engine.sampling import sample_record
from seqstate.io.tables import load_model


def sample_ok(
    tmp: Path, name: str, model: str, length: int, records: int, seed: int, prefix: str = "sim"
) -> tuple[Path, Path]:
    fa, truth = tmp / f"{name}.fa", tmp / f"{name}.truth.gff3"
    result = CliRunner().invoke(
        main,
        [
            "sample",
            model,
            "--length",
            str(length),
            "--records",
            str(records),
            "--seed",
            str(seed),
            "--prefix",
            prefix,
            "-o",
            str(fa),
            "--truth",
            str(truth),
        ],
    )
    assert result.exit_code == 0, result.stderr
    return fa, truth


def truth_features(path: Path) -> list[tuple[str, int, int, str, str]]:
    """(seqid, start 1-based, end, type, strand) of each feature line (GFF3 1.26 columns)."""
    out = []
    for line in path.read_text(encoding="utf-8").splitlines():
        if line and not line.startswith("#"):
            cols = line.split("\t")
            assert len(cols) == 9
            out.append((cols[0], int(cols[3]), int(cols[4]), cols[2], cols[6]))
    return out


def redrawn(model_name: str, length: int, records: int, seed: int, prefix: str = "sim"):
    """The records and labelled runs, drawn again from the engine sampler with the seed."""
    model = load_model(model_name)
    tables = api.prepare(model)
    rng = np.random.default_rng(seed)  # NumPy PCG64 Generator, as the sampler documents
    seqs, runs = {}, []
    for r in range(records):
        rid = f"{prefix}{r + 1}"
        path, sym = sample_record(tables, length, rng)
        seqs[rid] = "".join(model.alphabet[int(x)] for x in sym)
        pos = 0
        for state_label, grp in itertools.groupby(
            (model.states[int(z)].label, model.states[int(z)].strand) for z in path
        ):
            n = len(list(grp))
            label, strand = state_label
            if label is not None:
                runs.append((rid, pos + 1, pos + n, label, strand or "."))
            pos += n
    return seqs, runs


def read_fasta_bio(path: Path) -> dict[str, str]:
    with open(path, encoding="utf-8") as handle:  # Biopython FASTA parser
        return {rec.id: str(rec.seq) for rec in SeqIO.parse(handle, "fasta")}


@pytest.mark.parametrize(
    "model,length,records,seed",
    [
        ("cpg-island", 100_000, 3, 11),
        ("casino", 2_000, 2, 9),
        (str(DATA / "g-run-stranded"), 5_000, 2, 3),  # runs on both strands
    ],
)
def test_truth_is_the_runs_of_the_sampled_path(tmp_path, model, length, records, seed):
    fa, truth = sample_ok(tmp_path, "s", model, length, records, seed)
    seqs, runs = redrawn(model, length, records, seed)
    assert read_fasta_bio(fa) == seqs
    assert truth_features(truth) == runs
    assert len(runs) >= 2
    if "stranded" in model:
        assert {r[4] for r in runs} == {"+", "-"}
    lines = truth.read_text(encoding="utf-8").splitlines()
    # GFF3 1.26: version line, then one ##sequence-region per record
    assert lines[: records + 1] == ["##gff-version 3"] + [
        f"##sequence-region sim{r + 1} 1 {length}" for r in range(records)
    ]


def test_casino_records_are_die_faces_with_loaded_runs(tmp_path):
    fa, truth = sample_ok(tmp_path, "dice", "casino", 5_000, 1, 4, prefix="roll")
    seq = read_fasta_bio(fa)["roll1"]
    assert len(seq) == 5_000 and set(seq) <= set("123456")
    feats = truth_features(truth)
    assert feats and {f[3] for f in feats} == {"loaded"}
    # the loaded die shows a six half the time, the fair die one time in six (Durbin et al.
    # 1998, Biological Sequence Analysis, ch. 3)
    inside = "".join(seq[s - 1 : e] for _, s, e, _, _ in feats)
    mask = np.ones(len(seq), dtype=bool)
    for _, s, e, _, _ in feats:
        mask[s - 1 : e] = False
    outside = "".join(np.array(list(seq))[mask])
    assert inside.count("6") / len(inside) > 0.4
    assert outside.count("6") / len(outside) < 0.25


def test_same_seed_same_files(tmp_path):
    a = sample_ok(tmp_path, "a", "cpg-island", 30_000, 2, 5)
    b = sample_ok(tmp_path, "b", "cpg-island", 30_000, 2, 5)
    assert a[0].read_bytes() == b[0].read_bytes()
    assert a[1].read_bytes() == b[1].read_bytes()


def test_different_seeds_differ(tmp_path):
    a = sample_ok(tmp_path, "a", "cpg-island", 30_000, 2, 5)
    b = sample_ok(tmp_path, "b", "cpg-island", 30_000, 2, 6)
    sa, sb = read_fasta_bio(a[0]), read_fasta_bio(b[0])
    assert list(sa) == list(sb)
    assert all(sa[k] != sb[k] for k in sa)


def test_fasta_header_says_synthetic_and_names_model_and_seed(tmp_path):
    fa, _ = sample_ok(tmp_path, "h", "casino", 100, 2, 77, prefix="r")
    headers = [ln for ln in fa.read_text(encoding="utf-8").splitlines() if ln.startswith(">")]
    assert headers == [f">r{i} synthetic, sampled from model casino seed 77" for i in (1, 2)]
    # FASTA lines of 60 characters (common practice)
    body = [ln for ln in fa.read_text(encoding="utf-8").splitlines() if not ln.startswith(">")]
    assert max(len(ln) for ln in body) == 60


@pytest.mark.parametrize("option", [["--length", "0"], ["--records", "0"]])
def test_bad_sample_options_are_usage_errors(tmp_path, option):
    args = ["sample", "cpg-island", "--length", "10", "--seed", "1", "-o", str(tmp_path / "x.fa")]
    result = CliRunner().invoke(main, [*args, *option])  # click: the last value given wins
    assert result.exit_code == 2
    lines = result.stderr.splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: ") and option[0] in lines[0]
    assert not (tmp_path / "x.fa").exists()


# ---------------------------------------------------------------- gene models
def test_gene_truth_is_a_gene_hierarchy_of_the_sampled_path(tmp_path):
    fa, truth = sample_ok(tmp_path, "g", "gene-segment", 20_000, 2, 5)
    _, runs = redrawn("gene-segment", 20_000, 2, 5)
    rows = [line.split("\t") for line in truth.read_text().splitlines() if not line.startswith("#")]
    cds = [r for r in rows if r[2] == "CDS"]
    # the CDS lines are exactly the CDS runs of the path
    assert sorted((r[0], int(r[3]), int(r[4]), r[6]) for r in cds) == sorted(
        (rid, a, b, strand) for rid, a, b, label, strand in runs if label == "CDS"
    )
    assert cds
    ids = {}
    for r in rows:
        attrs = dict(kv.split("=", 1) for kv in r[8].split(";"))
        ids[attrs["ID"]] = (r[2], attrs.get("Parent"))
        if r[2] in ("exon", "CDS", "mRNA"):
            assert attrs["Parent"] in ids  # parents first (common practice for index tools)
        assert r[5] == "."  # a truth is not scored
    for r in cds:
        assert r[7] in ("0", "1", "2")  # GFF3 1.26: every CDS has a phase
        parent = dict(kv.split("=", 1) for kv in r[8].split(";"))["Parent"]
        assert ids[parent][0] == "mRNA" and ids[ids[parent][1]][0] == "gene"
    starts = [(r[0], int(r[3])) for r in rows]
    assert starts == sorted(starts)


def test_gene_truth_can_train_the_layout(tmp_path):
    # the sampled truth is a usable training annotation: fit counts its genes
    fa, truth = sample_ok(tmp_path, "g", "gene-segment", 30_000, 2, 3)
    out = tmp_path / "m"
    res = CliRunner().invoke(
        main,
        ["fit", "-m", "gene-segment-layout", "--fasta", str(fa), "--labels", str(truth)]
        + ["-o", str(out), "-q"],
    )
    assert res.exit_code == 0, res.stderr
    assert load_model(out).provenance["labelling"]["genes_used"] >= 2


def test_sample_help_says_what_records_is():
    res = CliRunner().invoke(main, ["sample", "--help"])
    assert res.exit_code == 0
    text = " ".join(res.output.split())
    assert "--records INTEGER Number of records to draw" in text, res.output


def _commands(group, path=()):
    import click

    for name, cmd in group.commands.items():
        if isinstance(cmd, click.Group):
            yield from _commands(cmd, (*path, name))
        else:
            yield (*path, name), cmd


def test_every_visible_option_of_every_command_has_help_text():
    import click

    missing = [
        (" ".join(path), param.opts[0])
        for path, cmd in _commands(main)
        for param in cmd.params
        if isinstance(param, click.Option) and not param.hidden and not param.help
    ]
    assert missing == []


def test_group_help_names_only_subcommands_that_exist():
    # the text above "Options:" of a command group names what it does: each verb there
    # is one of its subcommands, and each subcommand is named
    import re

    import click

    groups = {name: cmd for name, cmd in main.commands.items() if isinstance(cmd, click.Group)}
    assert groups
    for name, group in groups.items():
        res = CliRunner().invoke(main, [name, "--help"])
        assert res.exit_code == 0
        summary = res.output.split("Options:")[0].lower()
        verbs = set(re.findall(r"\b(list|check|describe|show|convert|build|edit)\b", summary))
        assert verbs == set(group.commands), (name, summary)
