"""``seqstate sample`` in bounded memory: records drawn and written a chunk at a time.

The streamed run must write the bytes the whole-record run wrote.  The checksums below are
regression values: SHA-256 of the FASTA and truth GFF3 written by ``seqstate sample`` before
it streamed (commit 8cf3c26, whole records in memory), for the same model, size and seed.
Peak memory is measured by ``benchmarks/bench_sample.py``, not here.
"""

from __future__ import annotations

import hashlib
import io
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from seqstate.cli import main
from seqstate.commands.sample import CHUNK_BASES, Sampler, TruthPieces
from seqstate.engine import api
from seqstate.engine.sampling import sample_record
from seqstate.io.fasta import Record, write_fasta
from seqstate.io.fasta_stream import FastaStreamWriter
from seqstate.io.gff3 import GFF3Writer
from seqstate.io.tables import load_model
from seqstate.kinds import group_index, kind_of, track_groups

# (model, length, records, seed) -> (FASTA sha256, truth GFF3 sha256): regression values
# computed with the whole-record implementation before this change (see the module text).
REGRESSION = {
    ("casino", 5000, 3, 7): (
        "2bfc55af4811dcb45a390753051166579dd0fa7de036d8844bf2258b156037a4",
        "6a7593de6abf208330ae0322bd4f5e5602daec4542b600bf68b6f1439243139a",
    ),
    ("cpg-island-8", 3000, 4, 3): (
        "01ab7df5efd053e4758f54a8710d10944e87bad5d6b3c1327ef2cfbbf578df11",
        "53d461b4c16f14a7b0a80097fadc5da519d5b4eadc6113b8164a4dc42a7d462d",
    ),
    ("cpg-island", 1, 3, 2): (
        "2441fee5bf751bc0676379f2561f27a2dd78da378cb801075936a3f4dc2ca299",
        "2eb20efeb6ad7b7b3c2bb38d0d8a6bd5842a6cbb0b7258aaceb26e2a4a682e10",
    ),
    ("gene-segment", 150000, 2, 5): (
        "066cebc2fc3fb869c85e04a86897b8f114594dd044d680f733dd2ad03b6b8da5",
        "8eb41252a978eb48860f5b5f3618370a597872b525d7e31da339bbace73097f5",
    ),
    # longer than one chunk (CHUNK_BASES = 2**20): the path and the FASTA cross chunks
    ("cpg-island", 2500000, 1, 11): (
        "2eb21a57e536c3c4ea67166b5b3ff5cca5077392161f4b22fd5762ded54027ce",
        "c6aef8405c0a149aae5658e4597ca19abefff41d084eb24fc25c6d3447488d95",
    ),
    ("gene-segment", 1048577, 1, 1): (
        "dada388038ce644083b7e1d9a14814896a4f4fd9040dfa36ff086f626a678558",
        "1b2da791b2e2e3f8cbedf5e33e4e5edd97bb1f88af42fac7dfdaf786addf4c96",
    ),
}


def _sha(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


@pytest.mark.parametrize("spec", sorted(REGRESSION), ids=lambda s: "-".join(map(str, s)))
def test_sample_bytes_equal_whole_record_run(tmp_path: Path, spec: tuple) -> None:
    model, length, records, seed = spec
    fa, truth = tmp_path / "s.fa", tmp_path / "s.gff3"
    args = ["sample", model, "--length", str(length), "--records", str(records)]
    args += ["--seed", str(seed), "-o", str(fa), "--truth", str(truth)]
    result = CliRunner().invoke(main, args)
    assert result.exit_code == 0, result.output
    assert (_sha(fa), _sha(truth)) == REGRESSION[spec]


def test_sampler_chunks_equal_engine_sampler() -> None:
    # the chunked draws are seqstate.engine.sampling.sample_record's, over three chunks
    tables = api.prepare(load_model("cpg-island"))
    n = 2 * CHUNK_BASES + 12_345
    path, sym = sample_record(tables, n, np.random.default_rng(42))
    rng = np.random.default_rng(42)
    parts = list(Sampler(tables).chunks(n, rng))
    assert [p.shape[0] for p, _ in parts] == [CHUNK_BASES, CHUNK_BASES, 12_345]
    assert np.array_equal(np.concatenate([p for p, _ in parts]), path)
    assert np.array_equal(np.concatenate([s for _, s in parts]), sym)
    # the generator is left where sample_record leaves it: the next record matches too
    again = np.random.default_rng(42)
    sample_record(tables, n, again)
    nxt = list(Sampler(tables).chunks(500, rng))
    assert np.array_equal(nxt[0][0], sample_record(tables, 500, again)[0])


def _whole_truth(model_name: str, path: np.ndarray) -> str:
    model = load_model(model_name)
    groups = track_groups(model)
    kind = kind_of(model)
    out = io.StringIO()
    gff = GFF3Writer(out)
    truth = kind.truth_of(path, model, group_index(model, groups))
    kind.write_truth(gff, model, groups, truth, "r1")
    return out.getvalue()


@pytest.mark.parametrize("model_name", ["gene-segment", "cpg-island", "casino"])
def test_truth_in_pieces_equals_whole_path(model_name: str) -> None:
    model = load_model(model_name)
    tables = api.prepare(model)
    path, _ = sample_record(tables, 600_000, np.random.default_rng(3))
    whole = _whole_truth(model_name, path)
    assert whole.count("\n") > 5  # features to compare (the sampled truth is not empty)
    rng = np.random.default_rng(9)
    for _ in range(3):
        # uneven chunks: 1 base to a few thousand, so cuts fall everywhere
        sizes = rng.integers(1, 4000, size=200)
        bounds = np.concatenate([[0], np.cumsum(sizes)])
        bounds = bounds[bounds < path.shape[0]].tolist() + [path.shape[0]]
        out = io.StringIO()
        groups = track_groups(model)
        pieces = TruthPieces(kind_of(model), model, groups, GFF3Writer(out), "r1")
        for a, b in zip(bounds[:-1], bounds[1:]):
            pieces.add(path[a:b])
        pieces.finish()
        assert out.getvalue() == whole


@pytest.mark.parametrize("width", [1, 7, 60, 61])
def test_fasta_stream_writer_equals_write_fasta(width: int) -> None:
    rng = np.random.default_rng(width)
    records = [
        Record(f"r{i}", "synthetic  two\tspaces" if i else "", bytes(rng.choice(list(b"ACGT"), n)))
        for i, n in enumerate([1, 59, 60, 61, 1000, 4321])
    ]
    expected = io.StringIO()
    write_fasta(expected, records, width=width)
    got = io.StringIO()
    w = FastaStreamWriter(got, width=width)
    for rec in records:
        w.start(rec.id, rec.description)
        cuts = sorted(set(rng.integers(0, len(rec.seq), size=5).tolist()) | {0, len(rec.seq)})
        for a, b in zip(cuts[:-1], cuts[1:]):
            w.write(rec.seq[a:b])
        w.end()
    assert got.getvalue() == expected.getvalue()


def test_fasta_stream_writer_refuses_misuse() -> None:
    w = FastaStreamWriter(io.StringIO())
    with pytest.raises(ValueError, match="no record started"):
        w.write(b"ACGT")
    with pytest.raises(ValueError, match="whitespace"):
        w.start("a b")
    w.start("a")
    with pytest.raises(ValueError, match="not ended"):
        w.start("b")
    with pytest.raises(ValueError, match="empty sequence"):
        w.end()
    with pytest.raises(ValueError, match="width"):
        FastaStreamWriter(io.StringIO(), width=0)
