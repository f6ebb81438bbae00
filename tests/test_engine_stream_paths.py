"""Streaming Viterbi and MEA paths (seqstate.engine.stream_paths) against the whole-record
kernels of seqstate (api.viterbi, mea.mea), for every kernel family.

Every expected value here comes from the project's own existing code: the whole-record
Viterbi of seqstate (api.viterbi; the generic family's steps via viterbi_pieces(generic=True))
and the whole-record MEA kernel of seqstate (mea.mea), or from a plain-NumPy run-length
encoding written in this file.  Models and records are the tests' own random draws
(tests/helpers.py).
"""

from __future__ import annotations

import numpy as np
import pytest
from helpers import kernel_family, random_model, sample_record

from seqstate.engine import api, mea, stream_paths
from seqstate.engine.stream_paths import PathPiece, mea_pieces, runs_of, viterbi_pieces
from seqstate.errors import ImpossibleSequenceError
from seqstate.io.tables import load_model
from seqstate.model import State, make_model

ALPHABET = "ACGT"


@pytest.fixture(autouse=True)
def specialised(monkeypatch):
    """The API's normal dispatch (specialised families), even under SEQSTATE_KERNELS=generic."""
    monkeypatch.setattr(api, "_USE_SMALL", True)


#: Back-pointer budgets: none kept (every block recomputed from its checkpoint), a few
#: blocks kept (both kinds of traceback and the hand-over between them), all kept.
BUDGETS = (0, 1500, 1 << 30)


@pytest.fixture(params=BUDGETS, ids=["recompute", "mixed", "one-pass"])
def budget(request, monkeypatch):
    monkeypatch.setattr(stream_paths, "BACKPOINTER_BUDGET", request.param)
    return request.param


# ----------------------------------------------------------------- models and records
def _family_model(family: str, seed: int, order: int = 1, with_end: bool = True):
    rng = np.random.default_rng(seed)
    if family == "generic":
        return random_model(rng, n_states=5, order=order, with_end=with_end, p_forbid=0.3)
    if family == "small":
        return random_model(
            rng, n_states=6, order=order, with_end=with_end, max_emitters=2, per_context=True
        )
    return random_model(rng, n_states=90, order=order, with_end=with_end, layout="chains")


def _tables(family: str, seed: int, **kw):
    t = api.prepare(_family_model(family, seed, **kw))
    assert kernel_family(t) == family  # the family under test really serves the model
    return t


def _codes(t, seed: int, n: int, p_unknown: float = 0.02) -> np.ndarray:
    rng = np.random.default_rng(seed)
    seq = sample_record(rng, n, p_unknown=p_unknown, tables=t, n_run=10)
    return np.ascontiguousarray(api.encode(t, seq))


class Reader:
    """codes(a, b) over an array, recording the longest read (to check streaming)."""

    def __init__(self, arr: np.ndarray) -> None:
        self.arr = arr
        self.longest = 0
        self.total = 0

    def __call__(self, a: int, b: int) -> np.ndarray:
        assert 0 <= a <= b <= self.arr.shape[0]
        self.longest = max(self.longest, b - a)
        self.total += b - a
        return self.arr[a:b]


def _joined(pieces, n: int) -> np.ndarray:
    """Pieces (last to first) checked for shape and order, joined in record order."""
    got = list(pieces)
    end = n
    for p in got:
        assert isinstance(p, PathPiece)
        assert p.end0 == end and p.start0 < p.end0
        assert p.states.dtype == np.int32 and p.states.shape == (p.end0 - p.start0,)
        end = p.start0
    assert end == 0
    return np.concatenate([p.states for p in reversed(got)]) if got else np.zeros(0, np.int32)


def _ref_mea(t, codes, gain, cls):
    """The plain-NumPy oracle of the MEA kernels (mea.mea_reference, full N x M tables)."""
    path, _ = mea.mea_reference(codes, gain, np.asarray(cls), t.E, t.transitions, t.start, t.end)
    return path


def _generic_mea(t, codes, gain, cls):
    """mea.mea on the generic family's kernels (independent of the chain-sparse slot ones);
    for records too long for the NumPy oracle."""
    with api_generic():
        return mea.mea(t, codes, gain, cls)


def _rle(path: np.ndarray, key: np.ndarray) -> list[tuple[int, int, int, int, int]]:
    """Plain run-length encoding of key[path] (the oracle of runs_of)."""
    k = key[path]
    out = []
    a = 0
    for i in range(1, len(path) + 1):
        if i == len(path) or k[i] != k[a]:
            out.append((a, i, int(k[a]), int(path[a]), int(path[i - 1])))
            a = i
    return out


# ----------------------------------------------------------------- Viterbi
B = 16  # the block of the random cases
LENGTHS = (1, 2, B - 1, B, B + 1, 7 * B + 3, 23 * B)


@pytest.mark.parametrize("family", ["generic", "small", "sparse"])
@pytest.mark.parametrize("n", LENGTHS)
def test_viterbi_pieces_equal_the_whole_record_kernel(family, n, budget):
    """Pieces joined = api.viterbi's path, and the same log probability, exactly."""
    t = _tables(family, 11 + n)
    codes = _codes(t, 100 + n, n)
    want_path, want_lp = api.viterbi(t, codes)
    for chunk in (B, 3 * B, 5, 1 << 20):  # chunks that are and are not multiples of the block
        reader = Reader(codes)
        lp, pieces = viterbi_pieces(t, n, reader, block=B, chunk=chunk)
        assert lp == want_lp
        got = _joined(pieces, n)
        assert np.array_equal(got, want_path.astype(np.int32))


@pytest.mark.parametrize("family", ["generic", "small", "sparse"])
@pytest.mark.parametrize("order", [0, 2])
def test_viterbi_pieces_any_block_and_default(family, order, budget):
    """Blocks 1, 2, 7 and the default; orders 0 and 2 (back-off codes at the start)."""
    t = _tables(family, 40 + order, order=order)
    n = 601
    codes = _codes(t, 41 + order, n, p_unknown=0.05)
    want_path, want_lp = api.viterbi(t, codes)
    for block in (1, 2, 7, None):
        lp, pieces = viterbi_pieces(t, n, Reader(codes), block=block, chunk=50)
        assert lp == want_lp
        assert np.array_equal(_joined(pieces, n), want_path)


@pytest.mark.parametrize("family", ["generic", "small", "sparse"])
def test_viterbi_pieces_read_codes_in_bounded_windows(family, budget):
    """The forward pass reads chunks of at most ``chunk`` codes, each piece at most a block."""
    t = _tables(family, 7)
    n = 5000
    codes = _codes(t, 8, n)
    want_path, _ = api.viterbi(t, codes)
    reader = Reader(codes)
    _, pieces = viterbi_pieces(t, n, reader, block=64, chunk=300)
    assert reader.longest <= 300
    longest = 0
    got = []
    for p in pieces:
        longest = max(longest, p.end0 - p.start0)
        got.append(p)
    assert longest <= 64 and reader.longest <= 300
    assert np.array_equal(_joined(got, n), want_path)


def test_viterbi_pieces_without_end_table(budget):
    for family in ("generic", "small", "sparse"):
        t = _tables(family, 5, with_end=False)
        codes = _codes(t, 6, 333)
        want_path, want_lp = api.viterbi(t, codes)
        lp, pieces = viterbi_pieces(t, 333, Reader(codes), block=10, chunk=77)
        assert lp == want_lp and np.array_equal(_joined(pieces, 333), want_path)


# ----------------------------------------------------------------- ties
def _ties_model():
    """Two identical states: every step ties (the rule: the lowest index wins)."""
    trans = np.array([[0.45, 0.45, 0.10], [0.45, 0.45, 0.10], [0.3, 0.3, 0.4]])
    em = np.array([[0.5, 0.5, 0.0, 0.0], [0.5, 0.5, 0.0, 0.0], [0.0, 0.0, 0.5, 0.5]])
    return make_model(
        name="ties",
        alphabet=ALPHABET,
        states=[State(f"s{i}") for i in range(3)],
        start=np.array([0.4, 0.4, 0.2]),
        transitions=trans,
        emissions=em,
    )


def test_viterbi_pieces_keep_the_tie_rule(budget):
    t = api.prepare(_ties_model())
    assert kernel_family(t) == "small"
    codes = api.encode(t, b"AACAGTNNACGA" * 9)
    want, lp0 = api.viterbi(t, codes)
    for block in (1, 5, 12):
        lp, pieces = viterbi_pieces(t, codes.shape[0], Reader(codes), block=block, chunk=7)
        assert lp == lp0 and np.array_equal(_joined(pieces, codes.shape[0]), want)
    with api_generic():
        lp, pieces = viterbi_pieces(t, codes.shape[0], Reader(codes), block=4, chunk=9)
        assert lp == lp0 and np.array_equal(_joined(pieces, codes.shape[0]), want)


class api_generic:
    """Within the block, the generic kernels only (as SEQSTATE_KERNELS=generic)."""

    def __enter__(self):
        self.old = api._USE_SMALL
        api._USE_SMALL = False

    def __exit__(self, *exc):
        api._USE_SMALL = self.old


# ----------------------------------------------------------------- impossible records
def _alternating_model():
    trans = np.array([[0.0, 1.0], [1.0, 0.0]])  # strict alternation
    em = np.array([[1.0, 0.0, 0.0, 0.0], [0.0, 1.0, 0.0, 0.0]])  # s0 emits A, s1 emits C
    return make_model(
        name="alt",
        alphabet=ALPHABET,
        states=[State("a"), State("c")],
        start=np.array([1.0, 0.0]),
        transitions=trans,
        emissions=em,
    )


def _ring_model(m: int = 40, with_end: bool = False):
    trans = np.zeros((m, m))
    for s in range(m):
        trans[s, (s + 1) % m] = 1.0
    em = np.zeros((m, 4))
    for s in range(m):
        em[s, [s % 4, (s + 1) % 4]] = [0.7, 0.3]
    start = np.zeros(m)
    start[0] = 1.0
    end = None
    if with_end:
        end = np.zeros(m)
        end[5] = 0.5
        trans[5] *= 0.5
    return make_model(
        name="ring",
        alphabet=ALPHABET,
        states=[State(f"s{i}") for i in range(m)],
        start=start,
        transitions=trans,
        emissions=em,
        end=end,
    )


def _message(call, *args, **kw) -> str:
    with pytest.raises(ImpossibleSequenceError) as exc:
        call(*args, **kw)
    return str(exc.value)


@pytest.mark.parametrize("generic", [False, True])
def test_impossible_records_raise_as_api_viterbi(generic, budget):
    """The same error (class and text) as api.viterbi, at the first impossible base, for a
    base in the first chunk, a later chunk, the very first base, and an unreachable end."""
    alt = api.prepare(_alternating_model())
    ring = api.prepare(_ring_model())
    ring_end = api.prepare(_ring_model(with_end=True))
    good = "".join(ALPHABET[s % 4] for s in range(400))
    cases = [
        (alt, b"ACAAC"),
        (alt, b"CA"),
        (alt, b"ACACACACACACACACACACACACACACACACACACACACACC"),
        (ring, good[:57] + ALPHABET[(57 + 2) % 4] + good[58:]),
        (ring, good[:301] + ALPHABET[(301 + 2) % 4] + good[302:]),
        (ring, "G" + good[1:]),
        (ring_end, good[:100]),  # ends in state 99 % 40 = 19, which may not end
    ]
    ctx = api_generic() if generic else _null()
    with ctx:
        for t, seq in cases:
            codes = api.encode(t, seq)
            n = codes.shape[0]
            want = _message(api.viterbi, t, codes, record="chrZ")
            for block, chunk in ((4, 10), (1, 3), (1000, 1 << 20)):
                got = _message(
                    viterbi_pieces, t, n, Reader(codes), block=block, chunk=chunk, record="chrZ"
                )
                assert got == want


class _null:
    def __enter__(self):
        return None

    def __exit__(self, *exc):
        return None


def test_empty_record_is_refused():
    t = _tables("generic", 1)
    with pytest.raises(ValueError):
        viterbi_pieces(t, 0, Reader(np.zeros(0, np.int64)))
    with pytest.raises(ValueError):
        list(
            mea_pieces(
                t,
                0,
                Reader(np.zeros(0, np.int64)),
                Reader(np.zeros((0, 2))),
                np.zeros(t.n_states, np.int64),
            )
        )


# ----------------------------------------------------------------- built-in models
@pytest.mark.parametrize("name,family", [("cpg-island", "small"), ("gene-segment", "sparse")])
def test_builtin_models_on_sampled_records(name, family, budget):
    t = api.prepare(load_model(name))
    assert kernel_family(t) == family
    n = 30_011
    codes = _codes(t, 2026, n, p_unknown=0.001)
    want_path, want_lp = api.viterbi(t, codes)
    for block, chunk in ((None, 1 << 20), (1000, 4096), (4096, 1000)):
        lp, pieces = viterbi_pieces(t, n, Reader(codes), block=block, chunk=chunk)
        assert lp == want_lp
        assert np.array_equal(_joined(pieces, n), want_path)


# ----------------------------------------------------------------- MEA
def _gain(t, codes, seed, k):
    """Gain rows: the posterior of random state classes (float32, as genes.py uses)."""
    rng = np.random.default_rng(seed)
    cls = rng.integers(0, k, size=t.n_states).astype(np.int64)
    post = api.posterior(t, codes, group=cls, n_groups=k)
    return cls, post.values


@pytest.fixture(params=BUDGETS, ids=["recompute", "mixed", "one-pass"])
def mea_budget(request, monkeypatch):
    monkeypatch.setattr(mea, "BACKPOINTER_BUDGET", request.param)
    return request.param


@pytest.mark.parametrize("family", ["generic", "small", "sparse"])
@pytest.mark.parametrize("n", LENGTHS)
def test_mea_pieces_equal_the_whole_record_kernel(family, n, mea_budget):
    """Pieces joined = the plain-NumPy oracle (mea.mea_reference) = mea.mea."""
    t = _tables(family, 21 + n)
    codes = _codes(t, 200 + n, n)
    cls, gain = _gain(t, codes, n, 3)
    want = _ref_mea(t, codes, gain, cls)
    assert np.array_equal(mea.mea(t, codes, gain, cls), want)
    for block in (B, 5, None):
        greader = Reader(gain)
        got = _joined(mea_pieces(t, n, Reader(codes), greader, cls, block=block), n)
        assert np.array_equal(got, want)


@pytest.mark.parametrize("family", ["generic", "small", "sparse"])
def test_mea_kernels_equal_the_numpy_reference(family):
    """The streaming kernels against mea.mea_reference (plain NumPy, full tables)."""
    t = _tables(family, 77)
    n = 300
    codes = _codes(t, 78, n)
    cls, gain = _gain(t, codes, 79, 4)
    ref, _ = mea.mea_reference(codes, gain, cls, t.E, t.transitions, t.start, t.end)
    assert np.array_equal(_ref_mea(t, codes, gain, cls), ref)
    got = _joined(mea_pieces(t, n, Reader(codes), Reader(gain), cls, block=13), n)
    assert np.array_equal(got, ref)


def test_mea_pieces_ties_and_float64_gain(mea_budget):
    """Integer-valued gains tie often: ties must go as in the whole-record kernel."""
    t = _tables("sparse", 3)
    n = 2000
    codes = _codes(t, 4, n)
    rng = np.random.default_rng(5)
    cls = rng.integers(0, 4, size=t.n_states).astype(np.int64)
    for gain in (
        np.zeros((n, 4)),
        rng.integers(0, 2, size=(n, 4)).astype(np.float64),
        rng.integers(0, 3, size=(n, 4)).astype(np.float32),
    ):
        want = _ref_mea(t, codes, gain, cls)
        if n <= 2000:
            ref, _ = mea.mea_reference(codes, gain, cls, t.E, t.transitions, t.start, t.end)
            assert np.array_equal(ref, want)
        for block in (1, 37, 500):
            got = _joined(mea_pieces(t, n, Reader(codes), Reader(gain), cls, block=block), n)
            assert np.array_equal(got, want)


def test_mea_pieces_read_gain_in_bounded_windows(monkeypatch):
    monkeypatch.setattr(mea, "WINDOW", 1000)
    t = _tables("sparse", 9)
    n = 12_000
    codes = _codes(t, 10, n)
    cls, gain = _gain(t, codes, 11, 5)
    want = _generic_mea(t, codes, gain, cls)
    creader, greader = Reader(codes), Reader(gain)
    pieces = mea_pieces(t, n, creader, greader, cls, block=100)
    assert greader.longest <= 1000 and creader.longest <= 1000
    got = _joined(pieces, n)
    assert np.array_equal(got, want)
    assert greader.longest <= 1000 and creader.longest <= 1000


def test_mea_pieces_gene_segment(mea_budget):
    """The gene model's posterior decoding (kinds.genes decoding classes) on a sampled record."""
    from seqstate.kinds.genes import decoding_classes

    model = load_model("gene-segment")
    t = api.prepare(model)
    n = 20_000
    codes = _codes(t, 31, n, p_unknown=0.001)
    cls, n_cls = decoding_classes(model)
    gain = api.posterior(t, codes, group=cls, n_groups=n_cls).values
    want = _generic_mea(t, codes, gain, cls)
    assert np.array_equal(mea.mea(t, codes, gain, cls), want)
    assert kernel_family(t) == "sparse"  # the slot kernels (mea_sparse) serve it
    got = _joined(mea_pieces(t, n, Reader(codes), Reader(gain), cls, block=777), n)
    assert np.array_equal(got, want)
    with api_generic():  # the plain streaming kernels on the same record
        got = _joined(mea_pieces(t, n, Reader(codes), Reader(gain), cls, block=500), n)
        assert np.array_equal(got, want)


def test_mea_pieces_impossible_record(monkeypatch):
    """No allowed path: the same error as the whole-record kernel (ValueError, position)."""
    monkeypatch.setattr(mea, "WINDOW", 1000)  # position 2100 lies in the third window
    t = api.prepare(_alternating_model())
    cls = np.array([0, 1])
    for seq, pos in ((b"ACAAC", 4), (b"CA", 1), (b"ACACACACACAAC", 12)):
        codes = api.encode(t, seq)
        n = codes.shape[0]
        gain = np.ones((n, 2))
        with pytest.raises(ValueError, match=f"reaches position {pos}$"):
            mea.mea_reference(codes, gain, cls, t.E, t.transitions, t.start, t.end)
        with pytest.raises(ValueError, match=f"reaches position {pos}$"):
            mea.mea(t, codes, gain, cls)
        with pytest.raises(ValueError, match=f"reaches position {pos}$"):
            mea_pieces(t, n, Reader(codes), Reader(gain), cls, block=2)
    # the chain-sparse slot kernels: a base no state can emit, in the first block, a later
    # block and a later window, and the first base
    ring = api.prepare(_ring_model())
    assert kernel_family(ring) == "sparse"
    good = "".join(ALPHABET[s % 4] for s in range(3000))
    cls = np.zeros(ring.n_states, dtype=np.int64)
    for pos in (3, 58, 2100, 1):
        seq = good[: pos - 1] + ALPHABET[(pos - 1 + 2) % 4] + good[pos:]
        codes = api.encode(ring, seq)
        gain = np.ones((3000, 1))
        with pytest.raises(ValueError, match=f"reaches position {pos}$"):
            mea.mea_reference(codes, gain, cls, ring.E, ring.transitions, ring.start, ring.end)
        for generic in (False, True):
            with api_generic() if generic else _null():
                with pytest.raises(ValueError, match=f"reaches position {pos}$"):
                    mea_pieces(ring, 3000, Reader(codes), Reader(gain), cls, block=64)
    # an end no state may take
    ring = api.prepare(_ring_model(with_end=True))
    seq = "".join(ALPHABET[s % 4] for s in range(100))
    codes = api.encode(ring, seq)
    gain = np.ones((100, 1))
    cls = np.zeros(ring.n_states, dtype=np.int64)
    with pytest.raises(ValueError, match="reaches position 100$"):
        mea_pieces(ring, 100, Reader(codes), Reader(gain), cls, block=7)
    with pytest.raises(ValueError, match="reaches position 100$"):
        mea.mea(ring, codes, gain, cls)


# ----------------------------------------------------------------- runs
def test_runs_of_against_plain_run_length_encoding():
    rng = np.random.default_rng(99)
    for trial in range(40):
        n = int(rng.integers(1, 300))
        m = int(rng.integers(1, 6))
        path = rng.integers(0, m, size=n).astype(np.int32)
        if trial % 3 == 0:
            path = np.repeat(path[: max(1, n // 20)], 20)[:n]  # long runs across pieces
            n = path.shape[0]
        key = rng.integers(0, 3, size=m)
        block = int(rng.integers(1, 40))
        pieces = [
            PathPiece(b0, min(n, b0 + block), path[b0 : b0 + block])
            for b0 in range(((n - 1) // block) * block, -1, -block)
        ]
        assert runs_of(iter(pieces), key) == _rle(path, key)


@pytest.mark.parametrize("family", ["small", "sparse"])
def test_runs_of_a_streamed_viterbi_path(family, budget):
    t = _tables(family, 61)
    n = 3000
    codes = _codes(t, 62, n)
    want_path, _ = api.viterbi(t, codes)
    key = np.arange(t.n_states) % 3
    _, pieces = viterbi_pieces(t, n, Reader(codes), block=50, chunk=128)
    assert runs_of(pieces, key) == _rle(want_path, key)


def test_runs_of_refuses_pieces_out_of_order():
    key = np.array([0, 1])
    pieces = [PathPiece(0, 2, np.array([0, 1], np.int32)), PathPiece(2, 4, np.zeros(2, np.int32))]
    with pytest.raises(ValueError):
        runs_of(pieces, key)


def test_public_names():
    assert set(stream_paths.__all__) >= {"viterbi_pieces", "mea_pieces", "runs_of", "PathPiece"}
