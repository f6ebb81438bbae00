"""Windowed record decoding (kinds/stream.py) against the whole-record path.

Every comparison here is against the project's own code: the whole-record path of
seqstate (``Kind.write_record`` on a :class:`RecordData`, with ``api.posterior``
values as the tracks).  The windowed path must give the same GFF3 and TSV text and
the same track values, byte for byte, for both model kinds and both decodings.
Records are drawn from the models' own chains (tests/helpers.sample_record,
``seqstate.engine.sampling``); runs of N are written into them to exercise
``--split-unknown``.  Blocks and windows are made small (a few hundred to a few
thousand bases) so that a record of 30-120 kb has many windows.
"""

from __future__ import annotations

import io

import numpy as np
import pytest

from seqstate.engine import api, sampling
from seqstate.errors import ImpossibleSequenceError
from seqstate.io.gff3 import GFF3Writer
from seqstate.io.tables import load_model
from seqstate.kinds import (
    GENES,
    SEGMENTS,
    RecordData,
    gene_stream,
    group_index,
    kind_of,
    track_groups,
)
from seqstate.kinds import genes as gene_kind
from seqstate.kinds import stream as stream_kind
from seqstate.kinds.stream import StreamRecord, write_stream_record
from seqstate.model import State, make_model
from tests.helpers import sample_record


class _Tables:
    """Prepared tables with more frequent label switches, to sample from (only)."""

    def __init__(self, tables, switch: float) -> None:
        self.__dict__.update(
            {k: getattr(tables, k) for k in ("start", "E", "offsets", "order", "n_symbols")}
        )
        self.n_states = tables.n_states
        t = np.array(tables.transitions, dtype=np.float64)
        t = t + switch * (t.sum(axis=1, keepdims=True) / t.shape[0])
        self.transitions = t


def _insert_unknown(seq: bytearray, rng: np.random.Generator, runs: int, n_max: int) -> None:
    for _ in range(runs):
        length = int(rng.integers(1, n_max))
        a = int(rng.integers(0, len(seq) - length))
        seq[a : a + length] = b"N" * length


def _cpg_record(model_name: str, n: int, seed: int, unknown: int = 0) -> tuple:
    model = load_model(model_name)
    tables = api.prepare(model)
    rng = np.random.default_rng(seed)
    # islands about every 5 kb instead of every 100 kb (sampling only; decoding uses the model)
    _, sym = sampling.sample_record(_Tables(tables, 2e-4), n, rng)
    seq = bytearray(np.frombuffer(model.alphabet.encode(), dtype=np.uint8)[sym].tobytes())
    _insert_unknown(seq, rng, unknown, 40)
    return model, tables, bytes(seq)


def _gene_record(n: int, seed: int, unknown: int = 0) -> tuple:
    model = load_model("gene-segment")
    tables = api.prepare(model)
    rng = np.random.default_rng(seed)
    text = sample_record(rng, n, model=model, tables=tables)
    seq = bytearray(text.encode())
    _insert_unknown(seq, rng, unknown, 40)
    return model, tables, bytes(seq)


def _whole(kind, model, tables, seq, decode, min_posterior, min_length, split, offset0=0):
    groups = track_groups(model)
    sg = group_index(model, groups)
    sym = api.symbols_of(tables, seq)
    codes = api.encode_symbols(tables, sym)
    post = api.posterior(tables, codes, group=sg, n_groups=len(groups), record="chrS")
    data = RecordData(
        model=model,
        tables=tables,
        groups=groups,
        state_group=sg,
        seqid="chrS",
        offset0=offset0,
        seq=seq,
        codes=codes,
        symbols=sym,
        post=post,
        decode=decode,
        min_posterior=min_posterior,
        min_length=min_length,
        split_unknown=split,
    )
    gff_text, tsv = io.StringIO(), io.StringIO()
    gff = GFF3Writer(gff_text)
    count = kind.write_record(data, gff, tsv)
    tracks = [post.values[:, g].copy() for g in range(len(groups))]
    return gff_text.getvalue(), tsv.getvalue(), tracks, count, post.loglik, int((sym < 0).sum())


def _streamed(
    kind,
    model,
    tables,
    seq,
    decode,
    min_posterior,
    min_length,
    split,
    block,
    window,
    offset0=0,
    sink_log=None,
    threads=1,
):
    groups = track_groups(model)
    sg = group_index(model, groups)
    sym = api.symbols_of(tables, seq)
    codes = api.encode_symbols(tables, sym)
    n = len(seq)
    asked = []

    def read_codes(a: int, b: int) -> np.ndarray:
        assert 0 <= a < b <= n
        asked.append(b - a)
        return codes[a:b].copy()

    rec = StreamRecord(
        model=model,
        tables=tables,
        groups=groups,
        state_group=sg,
        seqid="chrS",
        n=n,
        offset0=offset0,
        read_bases=lambda a, b: seq[a:b],
        read_codes=read_codes,
        read_symbols=lambda a, b: sym[a:b].copy(),
        decode=decode,
        min_posterior=min_posterior,
        min_length=min_length,
        split_unknown=split,
        window=window,
        block=block,
        threads=threads,
    )
    pieces: list[list[tuple[int, np.ndarray]]] = [[] for _ in groups]

    def sink(g: int, start0: int, values: np.ndarray) -> None:
        pieces[g].append((start0, np.array(values)))
        if sink_log is not None:
            sink_log.append(("track", g))

    gff_text, tsv = io.StringIO(), io.StringIO()
    gff = GFF3Writer(gff_text)
    try:
        count, ll, unknown = write_stream_record(kind, rec, gff, tsv, sink)
    finally:
        if sink_log is not None:
            sink_log += [("gff", gff_text.getvalue()), ("tsv", tsv.getvalue())] * bool(
                gff_text.getvalue() or tsv.getvalue()
            )
    tracks = []
    for g in range(len(groups)):
        pos = offset0
        for start0, vals in pieces[g]:
            assert start0 == pos  # pieces in order, without gaps
            pos += vals.shape[0]
        assert pos == offset0 + n
        tracks.append(np.concatenate([v for _, v in pieces[g]]))
    return gff_text.getvalue(), tsv.getvalue(), tracks, count, ll, unknown


def _features(gff_text: str) -> list[tuple[int, int]]:
    out = []
    for line in gff_text.splitlines():
        if line and not line.startswith("#"):
            cols = line.split("\t")
            out.append((int(cols[3]) - 1, int(cols[4])))
    return out


def _crossing(feats, n: int, edge: int) -> int:
    edges = range(edge, n, edge)
    return sum(1 for s0, e0 in feats if any(s0 < x < e0 for x in edges))


def _compare(kind, model, tables, seq, decode, mp, ml, split, block, window, offset0=0, threads=1):
    want = _whole(kind, model, tables, seq, decode, mp, ml, split, offset0)
    got = _streamed(
        kind, model, tables, seq, decode, mp, ml, split, block, window, offset0, threads=threads
    )
    assert got[0] == want[0]  # GFF3 text, byte for byte
    assert got[1] == want[1]  # feature table
    for g_want, g_got in zip(want[2], got[2], strict=True):
        assert g_got.dtype == g_want.dtype and g_got.tobytes() == g_want.tobytes()
    assert got[3:] == want[3:]  # count, log-likelihood, unknown bases
    return _features(want[0])


# ----------------------------------------------------------------- segments
@pytest.mark.parametrize("decode", ["posterior", "viterbi"])
@pytest.mark.parametrize("model_name", ["cpg-island", "cpg-island-8"])
def test_segments_windowed_equal_whole_record(model_name, decode):
    model, tables, seq = _cpg_record(model_name, 120_000, seed=11)
    block, window = 700, 2100
    feats = _compare(SEGMENTS, model, tables, seq, decode, 0.5, 200, 10, block, window)
    assert len(feats) >= 5
    assert _crossing(feats, len(seq), window) >= 2  # features across window edges


@pytest.mark.parametrize("decode", ["posterior", "viterbi"])
@pytest.mark.parametrize("model_name", ["cpg-island", "cpg-island-8"])
def test_segments_windowed_with_unknown_runs(model_name, decode):
    model, tables, seq = _cpg_record(model_name, 60_000, seed=5, unknown=60)
    block, window = 500, 1500
    for split in (3, 10):
        feats = _compare(
            SEGMENTS, model, tables, seq, decode, 0.3, 20, split, block, window, offset0=1234
        )
        assert _crossing(feats, len(seq), window) >= 1
    assert seq.count(b"N") > 500


def test_segments_windowed_overlapping_groups():
    # the segments kind on a multi-group model: runs of different groups overlap at a
    # low threshold, so the file order (start, end, group) mixes groups across windows
    model, tables, seq = _gene_record(40_000, seed=5, unknown=20)
    feats = _compare(SEGMENTS, model, tables, seq, "posterior", 0.2, 1, 5, 300, 900)
    assert any(b0 < a1 for (a0, b0), (a1, b1) in zip(feats, feats[1:]))  # overlaps exist
    assert _crossing(feats, len(seq), 900) >= 5


def test_segments_window_of_one_block_and_of_the_whole_record():
    model, tables, seq = _cpg_record("cpg-island", 30_000, seed=2, unknown=10)
    for block, window in ((400, 1), (400, 400), (30_000, 1 << 22), (997, 5000)):
        _compare(SEGMENTS, model, tables, seq, "posterior", 0.5, 50, 10, block, window)


# ----------------------------------------------------------------- genes
@pytest.mark.parametrize("block,window", [(600, 1800), (1000, 9000)])
@pytest.mark.parametrize("decode", ["posterior", "viterbi"])
def test_genes_windowed_equal_whole_record(decode, block, window):
    model, tables, seq = _gene_record(60_000, seed=7)
    assert kind_of(model) is GENES
    feats = _compare(GENES, model, tables, seq, decode, 0.5, 1, 10, block, window)
    assert len(feats) >= 20
    assert _crossing(feats, len(seq), window) >= 2
    if window > 5000:
        # some lines lie inside one window (scored on the window's own view)
        assert len(feats) - _crossing(feats, len(seq), window) >= 10


@pytest.mark.parametrize("decode", ["posterior", "viterbi"])
def test_genes_windowed_with_unknown_runs(decode):
    model, tables, seq = _gene_record(60_000, seed=8, unknown=40)
    for split in (2, 10):
        feats = _compare(GENES, model, tables, seq, decode, 0.5, 1, split, 500, 1500, 777)
        assert _crossing(feats, len(seq), 1500) >= 1


@pytest.mark.parametrize("decode", ["posterior", "viterbi"])
def test_two_threads_give_the_same_output(decode):
    model, tables, seq = _cpg_record("cpg-island", 40_000, seed=21, unknown=10)
    _compare(SEGMENTS, model, tables, seq, decode, 0.5, 100, 10, 600, 1800, threads=2)
    model, tables, seq = _gene_record(30_000, seed=22, unknown=10)
    _compare(GENES, model, tables, seq, decode, 0.5, 1, 10, 600, 1800, threads=2)


def test_genes_from_runs_equal_genes_from_path():
    model = load_model("gene-segment")
    tables = api.prepare(model)
    rng = np.random.default_rng(9)
    text, true_path = sample_record(rng, 150_000, model=model, tables=tables, with_path=True)
    seq = bytearray(text.encode())
    _insert_unknown(seq, rng, 300, 30)
    sym = api.symbols_of(tables, bytes(seq))
    unknown = sym < 0
    key = gene_kind.run_key(model)
    viterbi_path, _ = api.viterbi(tables, api.encode_symbols(tables, sym))
    probed = 0
    for path in (np.asarray(true_path, dtype=np.int64), viterbi_path.astype(np.int64)):
        k = key[path]
        change = np.flatnonzero(k[1:] != k[:-1]) + 1
        starts = np.concatenate([[0], change]).tolist()
        ends = np.concatenate([change, [len(path)]]).tolist()
        runs = [(a, b, int(k[a]), int(path[a]), int(path[b - 1])) for a, b in zip(starts, ends)]

        def state_at(q: int, path=path) -> int:
            nonlocal probed
            # only asked what the windowed path records: a known plus-strand CDS base
            # after an unknown one, or a minus-strand CDS base before an unknown one
            kq = key[path[q]]
            assert not unknown[q]
            assert (kq == 2 and q > 0 and unknown[q - 1]) or (
                kq == 4 and q + 1 < len(path) and unknown[q + 1]
            )
            probed += 1
            return int(path[q])

        for split in (None, 1, 3, 10):
            want = gene_kind.genes_from_path(path, model, unknown, split)
            got = gene_kind.genes_from_runs(
                runs, model, len(path), lambda a, b: unknown[a:b], split, state_at
            )
            assert got == want
            assert len(want) >= 5
            assert any(g.partial for g in want)
    assert probed > 0


@pytest.mark.parametrize("decode", ["posterior", "viterbi"])
def test_impossible_record_names_the_record_and_writes_nothing(decode):
    # strict alternation of an A state and a C state: "AA" cannot be emitted
    model = make_model(
        name="alt",
        alphabet="ACGT",
        states=[State("a", label="odd"), State("c")],
        start=np.array([1.0, 0.0]),
        transitions=np.array([[0.0, 1.0], [1.0, 0.0]]),
        emissions=np.array([[1.0, 0.0, 0.0, 0.0], [0.0, 1.0, 0.0, 0.0]]),
    )
    tables = api.prepare(model)
    seq = b"AC" * 1500 + b"A" + b"AC" * 300
    codes = api.encode(tables, seq)
    with pytest.raises(ImpossibleSequenceError) as whole:
        api.posterior(tables, codes, record="chrS")
    assert "position 3002" in str(whole.value)
    with pytest.raises(ImpossibleSequenceError) as got:
        _streamed(SEGMENTS, model, tables, seq, decode, 0.5, 1, 10, 50, 100, sink_log=(log := []))
    assert str(got.value) == str(whole.value)
    assert log == []  # nothing reached the writers
    # the same model on a possible record: streamed equals whole
    feats = _compare(SEGMENTS, model, tables, b"AC" * 2000, decode, 0.5, 1, 10, 50, 100)
    assert len(feats) == 2000


def test_genes_mea_traceback_reads_gain_windows(monkeypatch):
    # the MEA pass reading gain in short chunks and tracing back through every block
    # (no kept back-pointers): the gain reader serves both directions; same output
    from seqstate.engine import mea

    monkeypatch.setattr(mea, "WINDOW", 1000)
    monkeypatch.setattr(mea, "BACKPOINTER_BUDGET", 0)
    monkeypatch.setattr(gene_stream, "GAIN_WINDOW", 1500)
    model, tables, seq = _gene_record(30_000, seed=12, unknown=10)
    feats = _compare(GENES, model, tables, seq, "posterior", 0.5, 1, 10, 400, 2000)
    assert len(feats) >= 8


def test_gain_reader_serves_rows_in_both_directions():
    model, tables, seq = _gene_record(20_000, seed=4)
    codes = api.encode(tables, seq)
    cls, k = gene_kind.decoding_classes(model)
    whole = api.posterior(tables, codes, group=cls, n_groups=k, block=300).values
    rec = StreamRecord(
        model=model,
        tables=tables,
        groups=track_groups(model),
        state_group=group_index(model, track_groups(model)),
        seqid="chrS",
        n=len(seq),
        offset0=0,
        read_bases=lambda a, b: seq[a:b],
        read_codes=lambda a, b: codes[a:b],
        read_symbols=lambda a, b: api.symbols_of(tables, seq[a:b]),
        decode="posterior",
        min_posterior=0.5,
        min_length=1,
        split_unknown=10,
        window=1200,
        block=300,
    )
    rp = stream_kind.RecordPass(rec)
    reader = gene_stream.GainReader(rp, cls, k)
    computed = []
    real = rp.values
    rp.values = lambda *args: computed.append(args[:2]) or real(*args)
    n = len(seq)
    forward = [(a, min(n, a + 700)) for a in range(0, n, 700)]
    backward = [(b0, min(n, b0 + 300)) for b0 in range((n - 1) // 300 * 300, -1, -300)]
    for a, b in forward + backward:
        got = reader(a, b)
        assert got.tobytes() == whole[a:b].tobytes()
    blocks = sum(stop - first for first, stop in computed)
    nblocks = (n + 299) // 300
    assert blocks <= 2 * nblocks + 2 * len(forward)  # each direction about once


@pytest.mark.parametrize("decode", ["posterior", "viterbi"])
def test_short_records_and_block_edges(decode):
    model, tables, seq = _cpg_record("cpg-island", 3000, seed=31, unknown=3)
    for n in (1, 2, 99, 100, 101, 250, 3000):
        for mp in (0.0, 0.5):  # 0.0: one feature over the whole record, across every window
            _compare(SEGMENTS, model, tables, seq[:n], decode, mp, 1, 10, 100, 200)
    gmodel, gtables, gseq = _gene_record(3000, seed=32)
    for n in (1, 99, 100, 101, 3000):
        _compare(GENES, gmodel, gtables, gseq[:n], decode, 0.5, 1, 10, 100, 200)


def test_kind_without_a_windowed_decoder_uses_the_whole_record_path():
    from seqstate.kinds.base import Kind
    from seqstate.kinds.segments import SegmentKind

    class Plain(SegmentKind):
        write_stream = Kind.write_stream

    model, tables, seq = _cpg_record("cpg-island", 20_000, seed=33, unknown=5)
    feats = _compare(Plain(), model, tables, seq, "posterior", 0.5, 50, 10, 500, 1000, 99)
    assert len(feats) >= 1


def test_genes_on_two_threads_raise_the_checkpoints_error(monkeypatch):
    """With two threads a Viterbi decoding runs beside the checkpoint passes; when the
    checkpoints fail, their error is the one raised (as on one thread), after the decoding
    thread has stopped, and nothing reaches the writers."""
    model, tables, seq = _gene_record(20_000, seed=31)
    decoding = []
    real = gene_stream.GeneStream.predictions

    def predictions(self, rp, block):
        decoding.append(block)
        return real(self, rp, block)

    def failing(rec, threads=None):
        assert threads == 1  # the other thread decodes
        raise ImpossibleSequenceError("record 'chrS' has probability zero (test)")

    monkeypatch.setattr(gene_stream.GeneStream, "predictions", predictions)
    monkeypatch.setattr(gene_stream, "RecordPass", failing)
    with pytest.raises(ImpossibleSequenceError, match=r"\(test\)"):
        _streamed(GENES, model, tables, seq, "viterbi", 0.5, 1, 10, 600, 1800,
                  sink_log=(log := []), threads=2)  # fmt: skip
    assert decoding == [600] and log == []
