"""``seqstate index`` and the commands that read regions through a FASTA index (score, plot).

Inputs: the synthetic demo assembly (examples/cex_draft1.fa.gz, made by ``seqstate
sample``), unpacked or recompressed here, and small hand-written synthetic FASTA
texts.  Results through the index are compared with the same command reading the
whole file (the whole-file reader of seqstate), never with numbers written here.
Bad input: one ``error:`` line, the exit status of the README table (1 input
error, 2 usage error), no traceback, no output left behind.
"""

from __future__ import annotations

import gzip
import os
from pathlib import Path

import numpy as np
import pytest
from Bio import bgzf
from click.testing import CliRunner

from seqstate.cli import main
from seqstate.commands import score as score_module
from seqstate.io import faidx

HERE = Path(__file__).resolve().parent
DEMO = HERE.parent / "examples" / "cex_draft1.fa.gz"
CAND_BED = HERE / "data" / "score" / "candidates.bed"


@pytest.fixture(autouse=True)
def _fresh(monkeypatch):
    """No index kept in memory between tests; files of any size are indexed on first use."""
    faidx.clear_memory()
    monkeypatch.setattr(faidx, "AUTO_INDEX_BYTES", 0)
    yield
    faidx.clear_memory()


def run(args: list, status: int = 0):
    result = CliRunner().invoke(main, [str(a) for a in args])
    assert result.exception is None or isinstance(result.exception, SystemExit), result.exception
    assert "Traceback" not in result.stderr
    assert result.exit_code == status, result.stderr
    return result


def one_error(args: list, status: int, *words: str) -> str:
    result = run(args, status)
    lines = result.stderr.splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: "), lines
    for w in words:
        assert w in lines[0], (w, lines[0])
    return lines[0]


@pytest.fixture(scope="module")
def demo_text() -> bytes:
    return gzip.decompress(DEMO.read_bytes())


@pytest.fixture
def plain(tmp_path, demo_text) -> Path:
    fa = tmp_path / "demo.fa"
    fa.write_bytes(demo_text)
    return fa


# ---------------------------------------------------------------- seqstate index
def test_index_writes_the_fai_and_a_summary(plain, tmp_path):
    before = plain.read_bytes(), os.stat(plain).st_mtime_ns
    res = run(["index", plain])
    fai = tmp_path / "demo.fa.fai"
    entries = faidx.parse_fai(fai.read_text(), str(fai))
    records = [r for r in faidx.iter_fasta(plain)]  # the whole-file reader of seqstate
    assert [(e.name, e.length) for e in entries] == [(r.id, len(r.seq)) for r in records]
    assert res.stderr == (
        f"seqstate: {len(records)} record(s), {sum(len(r.seq) for r in records):,} bases "
        f"indexed -> {fai}\n"
    )
    assert (plain.read_bytes(), os.stat(plain).st_mtime_ns) == before
    assert run(["index", plain, "-q"], 2).stderr.startswith("error: output ")
    one_error(["index", plain], 2, str(fai), "already exists", "--force")
    fai.write_text("stale\n")
    run(["index", "--force", plain, "-q"])
    assert faidx.parse_fai(fai.read_text(), str(fai)) == entries


def test_index_of_bgzip_writes_fai_and_gzi(tmp_path, demo_text):
    fa = tmp_path / "demo.fa.gz"
    with bgzf.BgzfWriter(str(fa), "wb") as writer:
        writer.write(demo_text)
    run(["index", fa, "-q"])
    assert (tmp_path / "demo.fa.gz.fai").is_file() and (tmp_path / "demo.fa.gz.gzi").is_file()
    pairs = faidx.parse_gzi((tmp_path / "demo.fa.gz.gzi").read_bytes(), "gzi")
    # Biopython's BgzfWriter cuts the text into blocks of 65536 bytes (Bio/bgzf.py, read)
    blocks = -(-len(demo_text) // 65536)
    assert [u for _, u in pairs] == [65536 * k for k in range(1, blocks)]


def test_index_reports_the_fasta_error_of_every_command(tmp_path):
    fa = tmp_path / "bad.fa"
    fa.write_bytes(b">a\nACGT\n>b\nACQT\n")
    out = tmp_path / "out"
    line = one_error(["index", fa], 1, "record 'b'", "'Q'")
    assert line == one_error(["annotate", fa, "-o", out], 1)
    assert not (tmp_path / "bad.fa.fai").exists()


def test_index_of_stdin_plain_gzip_and_unequal_lines(tmp_path):
    one_error(["index", "-"], 2, "standard input cannot be indexed")
    gz = tmp_path / "x.fa.gz"
    gz.write_bytes(gzip.compress(b">a\nACGT\n"))
    one_error(["index", gz], 1, str(gz), "not bgzip", "compress it with bgzip")
    uneven = tmp_path / "u.fa"
    uneven.write_bytes(b">a\nACGT\nAC\nACGT\n")
    one_error(["index", uneven], 1, "cannot be indexed", "record 'a'", "unequal length")
    assert not list(tmp_path.glob("*.fai"))


# ---------------------------------------------------------------- score through the index
def score_table(fasta: Path, *extra) -> str:
    return run(["score", fasta, "--regions", CAND_BED, "-q", *extra]).stdout


def test_score_through_the_index_matches_the_whole_file_read(plain, tmp_path, monkeypatch):
    streamed = score_table(DEMO)  # plain gzip: the whole-file reader
    flanked = score_table(DEMO, "--flank", "500")
    run(["index", plain, "-q"])

    def refuse(*args, **kwargs):
        raise AssertionError("score read every record although the FASTA is indexed")

    monkeypatch.setattr(score_module, "read_model_records", refuse)
    assert score_table(plain) == streamed
    assert score_table(plain, "--flank", "500") == flanked


def test_score_on_plain_gzip_streams_with_a_note():
    res = run(["score", DEMO, "--regions", CAND_BED])
    lines = res.stderr.splitlines()
    assert lines[0] == (
        f"note: {DEMO} is plain gzip, read from the start (bgzip gives random access to regions)"
    )
    assert len(lines) == 2 and lines[1].startswith("seqstate: ")


def test_score_on_bgzip_without_gzi_builds_it(tmp_path, demo_text):
    fa = tmp_path / "demo.fa.gz"
    with bgzf.BgzfWriter(str(fa), "wb") as writer:
        writer.write(demo_text)
    res = run(["score", fa, "--regions", CAND_BED])
    assert res.stdout == score_table(DEMO)
    assert res.stderr.splitlines()[0] == (
        f"note: indexed {fa}: wrote {tmp_path / 'demo.fa.gz.fai'}, {tmp_path / 'demo.fa.gz.gzi'}"
    )
    assert (tmp_path / "demo.fa.gz.gzi").is_file()


def test_score_with_a_fai_of_another_file(plain, tmp_path):
    other = tmp_path / "other.fa"
    other.write_bytes(b">cex_ctg1 x\n" + b"ACGT" * 30 + b"\n")
    run(["index", other, "-q"])
    fai = tmp_path / "demo.fa.fai"
    fai.write_bytes((tmp_path / "other.fa.fai").read_bytes())
    out = tmp_path / "scores.tsv"
    one_error(
        ["score", plain, "--regions", CAND_BED, "-o", out],
        1,
        f"{fai}: index does not match {plain}",
        f"seqstate index --force {plain}",
    )
    assert not out.exists()


def test_score_with_a_bad_fai_line(plain, tmp_path):
    fai = tmp_path / "demo.fa.fai"
    fai.write_text("cex_ctg1\t100\t10\t60\t61\ncex_ctg2\t100\n")
    one_error(
        ["score", plain, "--regions", CAND_BED],
        1,
        f"{fai} line 2: 2 tab-separated field(s); expected 5",
        "seqstate index --force",
    )


def test_score_with_an_index_older_than_its_fasta(plain, tmp_path):
    run(["index", plain, "-q"])
    st = os.stat(tmp_path / "demo.fa.fai")
    os.utime(plain, ns=(st.st_atime_ns, st.st_mtime_ns + 5 * 10**9))
    one_error(["score", plain, "--regions", CAND_BED], 1, "index is older than", "--force")


def test_score_region_on_unknown_record_through_the_index(plain, tmp_path):
    run(["index", plain, "-q"])
    bed = tmp_path / "r.bed"
    bed.write_text("cex_ctg1\t10\t20\nnope\t1\t5\n")
    one_error(["score", plain, "--regions", bed], 1, f"{bed} line 2", "no record 'nope'")
    bed.write_text("cex_ctg1\t10\t99999999\n")
    one_error(["score", plain, "--regions", bed], 1, f"{bed} line 1", "ends past the end")


# ---------------------------------------------------------------- plot through the index
def test_plot_data_through_the_index_matches_the_whole_file_read(plain, monkeypatch):
    from seqstate.commands import plot as plot_module

    opts = plot_module.PlotOptions(str(DEMO), "cex_ctg1:186001-187500", "x.png", flank=2000)
    streamed = plot_module.plot_data(opts)
    whole = plot_module.plot_data(
        plot_module.PlotOptions(str(DEMO), "cex_ctg1:186001-187500", "x.png")
    )
    run(["index", plain, "-q"])
    monkeypatch.setattr(
        plot_module, "read_model_records", lambda *a, **k: pytest.fail("read every record")
    )
    for want, flank in ((streamed, 2000), (whole, None)):
        got = plot_module.plot_data(
            plot_module.PlotOptions(str(plain), "cex_ctg1:186001-187500", "x.png", flank=flank)
        )
        assert np.array_equal(got.values, want.values)
        assert got.decoded == want.decoded and (got.seqid, got.start0) == (want.seqid, want.start0)


@pytest.mark.parametrize(
    "region,status,words",
    [
        ("nope:1-10", 2, ["no record 'nope'", "cex_ctg1"]),
        ("cex_ctg1:1-999999999", 2, ["lies outside record cex_ctg1"]),
    ],
)
def test_plot_region_errors_through_the_index(plain, tmp_path, region, status, words):
    run(["index", plain, "-q"])
    out = tmp_path / "fig.png"
    one_error(["plot", plain, "--region", region, "-o", out], status, *words)
    assert not out.exists()
