"""Outputs are safe: the overwrite rule on every command, interrupts, full disks.

The rule (README "Outputs are safe"): an output that exists is replaced only with
--force; an output that is also an input, or two outputs of one run that are one
file, is always refused (exit 2, one line naming both).  Inputs are synthetic: the
small golden FASTA (our own sampler) and the fit test data.
"""

from __future__ import annotations

import errno
import os
import resource
import signal
import subprocess
import sys
from pathlib import Path

import pytest
from click.testing import CliRunner
from golden_util import GOLDEN_FASTA

from seqstate.cli import main

REPO = Path(__file__).resolve().parent.parent
FIT_DATA = Path(__file__).resolve().parent / "data" / "fit"
TWO = str(FIT_DATA / "two-labels")
COMPARE = Path(__file__).resolve().parent / "data" / "compare"


def run(args):
    return CliRunner().invoke(main, [str(a) for a in args])


def one_error(res, code: int = 2) -> str:
    lines = res.stderr.splitlines()
    assert res.exit_code == code, (res.exit_code, res.stderr)
    assert len(lines) == 1 and lines[0].startswith("error: "), res.stderr
    assert "Traceback" not in res.stderr
    return lines[0]


def listing(folder: Path) -> list[str]:
    return sorted(str(p.relative_to(folder)) for p in folder.rglob("*"))


def snapshot(folder: Path) -> dict[str, bytes]:
    return {str(p.relative_to(folder)): p.read_bytes() for p in folder.rglob("*") if p.is_file()}


# ---------------------------------------------------------------- fit
def test_fit_force_keeps_every_file_it_did_not_write(tmp_path):
    out = tmp_path / "m"
    out.mkdir()
    fasta = out / "two.fa"
    labels = out / "good.gff3"
    fasta.write_bytes((FIT_DATA / "two.fa").read_bytes())
    labels.write_bytes((FIT_DATA / "good.gff3").read_bytes())
    (out / "notes.txt").write_text("my notes")
    args = ["fit", fasta, "-m", TWO, "--labels", labels, "-o", out, "-q"]
    assert run(args).exit_code == 0
    first = snapshot(out)
    line = one_error(run(args))
    assert "already exists as a model (model.toml, start.tsv" in line and "--force" in line
    res = run([*args, "--force"])
    assert res.exit_code == 0, res.stderr
    assert fasta.read_bytes() == (FIT_DATA / "two.fa").read_bytes()
    assert labels.read_bytes() == (FIT_DATA / "good.gff3").read_bytes()
    assert (out / "notes.txt").read_text() == "my notes"
    again = snapshot(out)
    # same inputs, same tables; the manifest's provenance holds the new command line
    assert {k: v for k, v in again.items() if k != "model.toml"} == {
        k: v for k, v in first.items() if k != "model.toml"
    }
    assert listing(out) == sorted(first)


def test_fit_into_its_own_start_model_is_refused_even_with_force(tmp_path):
    start = tmp_path / "start"
    start.mkdir()
    for p in Path(TWO).iterdir():
        (start / p.name).write_bytes(p.read_bytes())
    before = snapshot(start)
    args = ["fit", FIT_DATA / "two.fa", "-m", start, "--em", "--max-iter", "1"]
    line = one_error(run([*args, "-o", start, "--force"]))
    assert f"output '{start / 'model.toml'}' is the input '{start / 'model.toml'}'" in line
    assert snapshot(start) == before


def test_fit_fasta_is_positional_and_fasta_option_a_hidden_alias(tmp_path):
    base = ["-m", TWO, "--em", "--max-iter", "1", "-q"]
    assert run(["fit", FIT_DATA / "two.fa", *base, "-o", tmp_path / "a"]).exit_code == 0
    assert run(["fit", "--fasta", FIT_DATA / "two.fa", *base, "-o", tmp_path / "b"]).exit_code == 0
    assert (tmp_path / "a" / "model.toml").read_bytes() != b""
    assert "--fasta" not in run(["fit", "--help"]).output
    assert "missing the FASTA" in one_error(run(["fit", *base, "-o", tmp_path / "c"]))


# ---------------------------------------------------------------- sample
def sample_args(out, *more):
    return ["sample", "cpg-island", "--length", "50", "--seed", "3", "-o", out, *more]


def test_sample_does_not_overwrite_without_force(tmp_path):
    out = tmp_path / "x.fa"
    out.write_text("my sequences\n")
    assert "already exists: use --force" in one_error(run(sample_args(out)))
    assert out.read_text() == "my sequences\n"
    res = run([*sample_args(out), "--force"])
    assert res.exit_code == 0 and out.read_text().startswith(">sim1 ")


@pytest.mark.parametrize("force", [[], ["--force"]])
def test_sample_truth_onto_its_own_fasta_is_refused(tmp_path, force):
    out = tmp_path / "x.fa"
    line = one_error(run([*sample_args(out), "--truth", out, *force]))
    assert line == (
        f"error: outputs '{out}' and '{out}' are the same file: give each output its own name"
    )
    assert listing(tmp_path) == []


def test_sample_prints_a_summary_unless_quiet(tmp_path):
    res = run([*sample_args(tmp_path / "x.fa"), "--truth", tmp_path / "x.gff3"])
    assert res.exit_code == 0
    lines = res.stderr.splitlines()
    assert len(lines) == 1 and lines[0].startswith("seqstate: 1 record(s) of 50 bases -> ")
    res = run([*sample_args(tmp_path / "y.fa"), "-q"])
    assert res.exit_code == 0 and res.stderr == ""


@pytest.mark.parametrize(
    "option,needle",
    [(["--seed", "-1"], "--seed -1 must be 0 or more"), (["--prefix", "a b"], "--prefix 'a b'")],
)
def test_sample_bad_seed_or_prefix_is_one_usage_line(tmp_path, option, needle):
    args = ["sample", "cpg-island", "--length", "50", "--seed", "3", "-o", tmp_path / "x.fa"]
    args = [*args, *option]
    assert needle in one_error(run(args))
    assert listing(tmp_path) == []


# ---------------------------------------------------------------- score, compare, plot
def test_score_output_onto_its_regions_input_is_refused(tmp_path):
    regions = tmp_path / "regions.bed"
    regions.write_text("chr1\t10\t200\n")
    for force in ([], ["--force"]):
        line = one_error(run(["score", GOLDEN_FASTA, "--regions", regions, "-o", regions, *force]))
        assert f"output '{regions}' is the input '{regions}'" in line
    assert regions.read_text() == "chr1\t10\t200\n"
    table = tmp_path / "t.tsv"
    assert run(["score", GOLDEN_FASTA, "--regions", regions, "-o", table, "-q"]).exit_code == 0
    assert "already exists" in one_error(
        run(["score", GOLDEN_FASTA, "--regions", regions, "-o", table])
    )
    again = run(["score", GOLDEN_FASTA, "--regions", regions, "-o", table, "--force", "-q"])
    assert again.exit_code == 0


def test_compare_output_rules_and_repeatable_type(tmp_path):
    pred, ref = COMPARE / "cds_pred.gff3", COMPARE / "cds_ref.gff3"
    out = tmp_path / "r.tsv"
    assert run(["compare", pred, ref, "-o", out, "-q"]).exit_code == 0
    assert "already exists" in one_error(run(["compare", pred, ref, "-o", out]))
    assert run(["compare", pred, ref, "-o", out, "--force", "-q"]).exit_code == 0
    copy = tmp_path / "pred.tsv"
    copy.write_bytes(pred.read_bytes())
    assert "is the input" in one_error(run(["compare", copy, ref, "-o", copy, "--force"]))
    assert copy.read_bytes() == pred.read_bytes()
    both = tmp_path / "both.tsv"
    res = run(["compare", pred, ref, "--type", "CDS", "--type", "exon", "-o", both, "-q"])
    if res.exit_code == 0:  # both files hold both types
        rows = both.read_text().splitlines()
        assert rows[0] == "type\tmetric\tvalue"
        assert {r.split("\t")[0] for r in rows[1:]} == {"CDS", "exon"}
    else:  # a type missing from a file is an input error naming it (exit 1)
        assert "exon" in one_error(res, 1)


def test_plot_replaces_a_figure_only_with_force(tmp_path):
    pytest.importorskip("matplotlib")  # the plot extra
    out = tmp_path / "f.svg"
    out.write_text("my figure")
    args = ["plot", GOLDEN_FASTA, "--region", "chr1:1-500", "-o", out, "-q"]
    assert "already exists" in one_error(run(args))
    assert out.read_text() == "my figure"
    assert run([*args, "--force"]).exit_code == 0
    assert out.read_text().startswith("<?xml")


# ---------------------------------------------------------------- annotate
def test_annotate_twice_needs_force_and_regions_get_their_own_names(tmp_path):
    out = tmp_path / "out"
    assert run(["annotate", GOLDEN_FASTA, "-o", out, "-q"]).exit_code == 0
    first = snapshot(out)
    assert "already exists: use --force" in one_error(run(["annotate", GOLDEN_FASTA, "-o", out]))
    assert snapshot(out) == first
    assert run(["annotate", GOLDEN_FASTA, "-o", out, "-q", "--force"]).exit_code == 0
    again = snapshot(out)
    del again["small.run.json"], first["small.run.json"]  # it holds the command line
    assert again == first
    for region in ("chr1:1-3000", "chr1:3001-6000"):
        assert run(["annotate", GOLDEN_FASTA, "-o", out, "-q", "--region", region]).exit_code == 0
    stems = {name.split(".gff3")[0] for name in snapshot(out) if name.endswith(".gff3")}
    assert stems == {"small", "small.chr1_1-3000", "small.chr1_3001-6000"}
    assert run(["annotate", GOLDEN_FASTA, "-o", out, "-q", "--stem", "mine"]).exit_code == 0
    assert (out / "mine.gff3").read_bytes() == first["small.gff3"]


def test_annotate_refuses_an_output_that_is_its_input(tmp_path):
    fasta = tmp_path / "x.gff3"  # a FASTA with an odd name, in the output folder
    fasta.write_bytes(GOLDEN_FASTA.read_bytes())
    line = one_error(run(["annotate", fasta, "-o", tmp_path, "--stem", "x", "--force"]))
    assert f"output '{fasta}' is the input '{fasta}'" in line
    assert listing(tmp_path) == ["x.gff3"]


def test_annotate_to_stdout_writes_only_the_gff3(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    res = run(["annotate", GOLDEN_FASTA, "-o", "-"])
    assert res.exit_code == 0, res.stderr
    assert not (tmp_path / "-").exists()
    folder = tmp_path / "ref"
    assert run(["annotate", GOLDEN_FASTA, "-o", folder, "-q"]).exit_code == 0
    assert res.stdout == (folder / "small.gff3").read_text()
    assert res.stderr.splitlines()[-1].endswith("-> stdout")
    assert listing(tmp_path) == sorted(["ref", *(f"ref/{n}" for n in listing(folder))])
    line = one_error(run(["annotate", GOLDEN_FASTA, "-o", "-", "--tracks", "bedgraph"]))
    assert "needs an output folder" in line


@pytest.mark.parametrize(
    "command",
    [
        ["annotate", GOLDEN_FASTA, "--region", ""],
        ["annotate", GOLDEN_FASTA, "-o", ""],
        ["plot", GOLDEN_FASTA, "--region", "", "-o", "x.png"],
        ["compare", COMPARE / "cds_pred.gff3", COMPARE / "cds_ref.gff3", "--region", ""],
        ["sample", "cpg-island", "--length", "5", "--seed", "1", "-o", ""],
        ["score", GOLDEN_FASTA, "--regions", "r.bed", "-o", ""],
        ["fit", GOLDEN_FASTA, "-m", "cpg-island", "--em", "-o", ""],
    ],
)
def test_empty_region_or_output_is_one_usage_line(tmp_path, monkeypatch, command):
    monkeypatch.chdir(tmp_path)
    line = one_error(run(command))
    assert "is empty" in line
    assert listing(tmp_path) == []


def test_ids_with_control_characters_are_escaped_in_tsv_and_bedgraph(tmp_path):
    fasta = tmp_path / "c.fa"
    fasta.write_bytes(b">a\x01b\nACGCGCGCGTTTACGCGCGCGA\n")
    out = tmp_path / "out"
    assert (
        run(
            ["annotate", fasta, "-o", out, "-q", "--min-posterior", "0", "--min-length", "1"]
        ).exit_code
        == 0
    )
    rows = (out / "c.features.tsv").read_text().splitlines()[1:]
    bedgraph = (out / "c.CpG_island.bedgraph").read_text().splitlines()[1:]
    # TSV cells follow the project's one escaping rule (README "Outputs"): \xNN
    assert rows and all(r.split("\t")[0] == "a\\x01b" for r in rows)
    assert rows[0].split("\t")[5] == "a\\x01b.CpG_island.1"
    # tracks: GFF3 1.26 percent-encodes control characters as %XX (uppercase hex): the same
    assert bedgraph and all(line.split("\t")[0] == "a%01b" for line in bedgraph)
    assert all(len(r.split("\t")) == len(rows[0].split("\t")) for r in rows)


# ---------------------------------------------------------------- write failures
def test_bedgraph_write_on_a_full_disk_is_one_line(tmp_path, monkeypatch):
    from seqstate.io import tracks

    def full(self, *args, **kwargs):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(tracks.BedGraphTrack, "add", full)
    out = tmp_path / "out"
    line = one_error(run(["annotate", GOLDEN_FASTA, "-o", out, "-q"]))
    assert line == f"error: output folder '{out}' cannot be written: No space left on device"
    assert not out.exists()


def test_bigwig_on_a_nearly_full_disk_fails_cleanly_before_writing(tmp_path, monkeypatch):
    pytest.importorskip("pyBigWig")  # the bigwig extra
    from seqstate.io import tracks

    real = tracks.shutil.disk_usage

    def nearly_full(path):
        usage = real(path)
        return type(usage)(usage.total, usage.total - 1000, 1000)

    monkeypatch.setattr(tracks.shutil, "disk_usage", nearly_full)
    out = tmp_path / "out"
    out.mkdir()
    (out / "keep.txt").write_text("x")
    line = one_error(run(["annotate", GOLDEN_FASTA, "-o", out, "-q", "--tracks", "bigwig"]))
    assert line.startswith(
        f"error: output folder '{out}' cannot be written: No space left on device (bigWig "
    )
    assert listing(out) == ["keep.txt"]


def _cli(args, **kwargs):
    env = dict(os.environ, PYTHONPATH=str(REPO))
    if "stdout" not in kwargs:
        kwargs["capture_output"] = True
    return subprocess.run(
        [sys.executable, "-m", "seqstate", *map(str, args)],
        env=env,
        text=True,
        timeout=300,
        **kwargs,
    )


@pytest.mark.skipif(not Path("/dev/full").exists(), reason="needs /dev/full (Linux)")
@pytest.mark.parametrize(
    "command",
    [
        ["score", GOLDEN_FASTA, "--regions", "REGIONS", "-q"],
        ["compare", COMPARE / "cds_pred.gff3", COMPARE / "cds_ref.gff3"],
        ["annotate", GOLDEN_FASTA, "-o", "-", "-q"],
    ],
)
def test_stdout_on_a_full_device_is_one_line(tmp_path, command):
    regions = tmp_path / "r.bed"
    regions.write_text("chr1\t10\t200\n")
    command = [regions if c == "REGIONS" else c for c in command]
    with open("/dev/full", "w") as full:
        res = _cli(command, stdout=full, stderr=subprocess.PIPE)
    assert res.returncode == 2, res.stderr
    assert res.stderr.splitlines() == [
        "error: standard output cannot be written: No space left on device"
    ]


def test_file_size_limit_while_writing_is_one_line(tmp_path):
    out = tmp_path / "out"

    def limit():  # SIGXFSZ stays at its default here: the CLI must ignore it itself
        resource.setrlimit(resource.RLIMIT_FSIZE, (2_000, 2_000))

    res = _cli(["annotate", GOLDEN_FASTA, "-o", out, "-q"], preexec_fn=limit)
    assert res.returncode == 2, res.stderr
    assert res.stderr.splitlines() == [
        f"error: output folder '{out}' cannot be written: File too large"
    ]
    assert not out.exists()


# ---------------------------------------------------------------- signals
@pytest.mark.parametrize(
    "signame, point",
    # record-written: the first record's outputs are in the staged files, the second
    # record not yet run; commit: every file staged, the commit about to start
    [
        ("SIGTERM", "record-written"),
        ("SIGHUP", "commit"),
        ("SIGINT", "record-written"),
        ("SIGTERM", "commit"),
    ],
)
def test_signal_mid_run_leaves_no_temporary_file_and_the_old_outputs(
    tmp_path, held_run, signame, point
):
    fasta = tmp_path / "big.fa"
    made = run(
        ["sample", "cpg-island", "--length", "200000", "--records", "2", "--seed", "9"]
        + ["-o", fasta, "-q"]
    )
    assert made.exit_code == 0
    out = tmp_path / "out"
    out.mkdir()
    (out / "big.gff3").write_text("old features\n")
    (out / "big.features.tsv").write_text("old table\n")
    before = snapshot(out)
    # held at the point (SEQSTATE_TEST_HOLD) until the signal arrives: no race with the clock
    proc = held_run(["annotate", fasta, "-o", out, "--force"], point)
    assert any(p.name.startswith(".seqstate-stage-") for p in out.iterdir())
    proc.send_signal(getattr(signal, signame))
    _, err = proc.communicate(timeout=120)
    assert proc.returncode == 130, err
    assert err.splitlines() == ["error: interrupted"]
    assert snapshot(out) == before
    assert listing(out) == sorted(before)


def test_stale_staging_folder_of_a_killed_run_is_cleaned_by_the_next_run(tmp_path):
    proc = subprocess.Popen([sys.executable, "-c", "pass"])
    proc.wait()
    out = tmp_path / "out"
    stage = out / f".seqstate-stage-{proc.pid}"
    stage.mkdir(parents=True)
    (stage / "small.gff3").write_text("half")
    (out / f".small.gff3.tmp-{proc.pid}").write_text("from an older version")
    assert run(["annotate", GOLDEN_FASTA, "-o", out, "-q"]).exit_code == 0
    assert listing(out) == sorted(
        f"small.{x}"
        for x in ("gff3", "features.tsv", "records.tsv", "CpG_island.bedgraph", "run.json")
    )


def test_file_size_limit_on_a_single_file_output_names_it(tmp_path):
    out = tmp_path / "x.fa"

    def limit():
        resource.setrlimit(resource.RLIMIT_FSIZE, (2_000, 2_000))

    res = _cli(
        ["sample", "cpg-island", "--length", "20000", "--seed", "1", "-o", out, "-q"],
        preexec_fn=limit,
    )
    assert res.returncode == 2, res.stderr
    assert res.stderr.splitlines() == [f"error: output '{out}' cannot be written: File too large"]
    assert listing(tmp_path) == []
