"""Streaming posteriors (seqstate.engine.stream) against the whole-record posterior.

The reference of every assertion here is the project's own whole-record posterior
(``api.posterior``, the checkpointed kernels of seqstate for each kernel family) and its
segment and vector queries: the streaming passes must give the same checkpoints, the
same log-likelihood, the same posterior values and the same query results bit for bit,
for every family (generic, small two-state, chain-sparse), record lengths around the
block length, chunks smaller than a block and not a multiple of it, and one or two
threads.  One check compares with the plain-NumPy scaled forward-backward of
:mod:`seqstate.engine.reference` (Rabiner 1989, section V.A) to rounding.
"""

from __future__ import annotations

import time

import numpy as np
import pytest
from helpers import kernel_family, sample_record

from seqstate.engine import api, buffers, reference, sampling, stream
from seqstate.errors import ImpossibleSequenceError
from seqstate.io.tables import load_model
from seqstate.model import State, make_model

BLOCK = 16
LENGTHS = [1, BLOCK - 1, BLOCK, BLOCK + 1, 3 * BLOCK + 5]
CHUNKS = [5, 1 << 20]  # smaller than a block and not a multiple of it; the whole record
FAMILIES = ["generic", "small", "sparse"]
ARRAYS = ("alpha_ck", "alpha_ck_log", "beta_ck", "beta_ck_log")


def _family_model(name, random_model):
    """A random model of the family ``name`` (the tests' own parameters, tests/helpers.py)."""
    rng = np.random.default_rng({"generic": 3, "small": 4, "sparse": 5}[name])
    if name == "generic":
        return random_model(rng, n_states=5, order=2, with_end=True, p_forbid=0.2)
    if name == "small":
        return random_model(rng, n_states=4, order=1, max_emitters=2)
    return random_model(rng, n_states=40, order=2, with_end=True, layout="chains")


def _tables(name, random_model, kernel_switch):
    model = _family_model(name, random_model)
    with kernel_switch("specialised"):
        t = api.prepare(model)
        assert kernel_family(t) == name  # the family under test really serves the tables
    return model, t


def _codes(model, t, n, seed):
    """Codes of a record drawn from the model (possible), with unknown bases mixed in."""
    rng = np.random.default_rng(seed)
    seq = sample_record(rng, n, p_unknown=0.05, model=model, tables=t, n_run=4)
    return api.encode(t, seq)


def _reader(codes, calls=None):
    def read(a, b):
        if calls is not None:
            calls.append((a, b))
        return codes[a:b]

    return read


def _groupings(model, t):
    """Per state (None), and by label (few columns: the sparse family renumbers)."""
    labels = model.label_index()
    return [(None, None), (labels, int(labels.max()) + 1)]


def _assert_checkpoints(ck, post):
    for name in ARRAYS:
        a, b = getattr(ck, name), getattr(post, name)
        assert a.dtype == b.dtype and a.shape == b.shape
        assert np.array_equal(a, b), name
    assert ck.loglik == post.loglik
    assert ck.block == post.block


# ----------------------------------------------------------------- every family
@pytest.mark.parametrize("name", FAMILIES)
def test_checkpoints_and_blocks_equal_the_whole_record_posterior(name, random_model, kernel_switch):
    """Checkpoints, log-likelihood and every span of blocks equal api.posterior (the
    whole-record kernels of seqstate) bit for bit, for one and two threads."""
    model, t = _tables(name, random_model, kernel_switch)
    with kernel_switch("specialised"):
        for n in LENGTHS:
            codes = _codes(model, t, n, seed=n)
            for group, n_groups in _groupings(model, t):
                post = api.posterior(t, codes, group=group, n_groups=n_groups, block=BLOCK)
                for chunk in CHUNKS:
                    cks = []
                    for threads in (1, 2):
                        ck = stream.checkpoints(
                            t, n, _reader(codes), block=BLOCK, chunk=chunk, threads=threads,
                            group=group, n_groups=n_groups,
                        )  # fmt: skip
                        _assert_checkpoints(ck, post)
                        cks.append(ck)
                    ck = cks[0]
                    nb = ck.nblocks
                    assert nb == (n + BLOCK - 1) // BLOCK
                    for first in range(nb):
                        for stop in range(first + 1, nb + 1):
                            s0, e0 = ck.span_of(first, stop)
                            part = codes[s0:e0]
                            one = stream.posterior_blocks(t, ck, part, first, stop, group, n_groups)
                            two = stream.posterior_blocks(
                                t, ck, part, first, stop, group, n_groups, threads=2
                            )
                            want = post.values[s0:e0]
                            assert one.dtype == want.dtype and one.shape == want.shape
                            assert np.array_equal(one, want), (n, chunk, first, stop)
                            assert np.array_equal(two, want), (n, chunk, first, stop)


@pytest.mark.parametrize("name", FAMILIES)
def test_default_block_float64_and_per_state_values(name, random_model, kernel_switch):
    """Default block (api.default_block, as api.posterior), float64 output, per state."""
    model, t = _tables(name, random_model, kernel_switch)
    with kernel_switch("specialised"):
        n = 2500
        codes = _codes(model, t, n, seed=9)
        post = api.posterior(t, codes, dtype=np.float64)
        ck = stream.checkpoints(t, n, _reader(codes), chunk=777, threads=2)
        assert ck.block == api.default_block(n)
        _assert_checkpoints(ck, post)
        got = stream.posterior_blocks(t, ck, codes, 0, ck.nblocks, dtype=np.float64, threads=2)
        assert got.dtype == np.float64 and np.array_equal(got, post.values)


@pytest.mark.parametrize("name", FAMILIES)
def test_every_family_agrees_with_the_numpy_reference(name, random_model, kernel_switch):
    """The streamed per-state posterior against the plain-NumPy scaled forward-backward
    (Rabiner 1989, section V.A, seqstate.engine.reference) to rounding."""
    model, t = _tables(name, random_model, kernel_switch)
    codes = _codes(model, t, 300, seed=2)
    with kernel_switch("specialised"):
        ck = stream.checkpoints(t, 300, _reader(codes), block=BLOCK, chunk=7, threads=2)
        got = stream.posterior_blocks(t, ck, codes, 0, ck.nblocks, dtype=np.float64)
    lattice = t.E[codes]
    ll, gamma = reference.forward_backward(t.start, t.transitions, t.end, lattice)[:2]
    assert ck.loglik == pytest.approx(ll, rel=1e-12)
    np.testing.assert_allclose(got, gamma, rtol=1e-9, atol=1e-12)


def test_reader_is_asked_for_chunks_only(random_model, kernel_switch):
    """Each pass reads the record once, ``chunk`` positions at a time (the backward pass
    from the end); no call asks for more."""
    model, t = _tables("generic", random_model, kernel_switch)
    n = 103
    codes = _codes(model, t, n, seed=1)
    calls: list[tuple[int, int]] = []
    with kernel_switch("specialised"):
        stream.checkpoints(t, n, _reader(codes, calls), block=BLOCK, chunk=10)
    backward = [(max(0, b - 10), b) for b in range(n, 0, -10)]
    forward = [(a, min(n, a + 10)) for a in range(0, n, 10)]
    assert calls == backward + forward  # one thread: the backward pass runs first
    assert sum(b - a for a, b in calls) == 2 * n


# ----------------------------------------------------------------- views and queries
def _query_masks(model):
    labels = model.label_index()
    return [labels == 0, labels != 0]


@pytest.mark.parametrize("name", [*FAMILIES, "generic-chains"])
def test_view_queries_equal_whole_record_queries(name, random_model, kernel_switch):
    """Segment probability and log-odds, forward and backward vectors on a view equal the
    same queries on the whole-record Posterior with shifted coordinates, for segments
    with local start >= 1 (or in the first span).  "generic-chains": the sparse family's
    model on the generic kernels (at least 32 states: the wide query steps)."""
    kind = "generic" if name == "generic-chains" else "specialised"
    model, t = _tables(name.replace("generic-chains", "sparse"), random_model, kernel_switch)
    n = 5 * BLOCK + 3
    with kernel_switch(kind):
        assert kernel_family(t) == name.split("-")[0]
        codes = _codes(model, t, n, seed=21)
        labels = model.label_index()
        group, ng = labels, int(labels.max()) + 1
        post = api.posterior(t, codes, group=group, n_groups=ng, block=BLOCK)
        ck = stream.checkpoints(t, n, _reader(codes), block=BLOCK, chunk=11, group=group,
                                n_groups=ng)  # fmt: skip
        checked = 0
        for first, stop in ((0, 2), (1, 3), (2, 6), (4, 6), (0, 6)):
            s0, e0 = ck.span_of(first, stop)
            part = codes[s0:e0]
            vals = stream.posterior_blocks(t, ck, part, first, stop, group, ng)
            v = stream.view(t, ck, part, first, stop, vals)
            assert v.loglik == post.loglik and v.block == post.block
            assert np.array_equal(v.values, post.values[s0:e0])
            length = e0 - s0
            for pos in sorted({0, 1, BLOCK - 1, BLOCK, length // 2, length - 2, length - 1}):
                if not 0 <= pos < length:
                    continue
                for fn in (api.forward_vector, api.backward_vector):
                    got, lg = fn(t, part, v, pos)
                    want, wlg = fn(t, codes, post, s0 + pos)
                    assert lg == wlg and np.array_equal(got, want), (fn.__name__, pos)
            lo = 0 if first == 0 else 1
            segs = [(lo, lo + 5), (lo + 3, length), (BLOCK - 2, BLOCK + 9), (length - 4, length)]
            for a, b in segs:
                if not 0 <= a < b <= length:
                    continue
                for mask in _query_masks(model):
                    for fn in (api.segment_log_probability, api.segment_log_odds):
                        got = fn(t, part, v, a, b, mask)
                        want = fn(t, codes, post, s0 + a, s0 + b, mask)
                        assert got == want or (np.isnan(got) and np.isnan(want)), (fn, a, b)
                        checked += 1
        assert checked >= 60


def test_view_without_values(random_model, kernel_switch):
    model, t = _tables("small", random_model, kernel_switch)
    codes = _codes(model, t, 40, seed=3)
    ck = stream.checkpoints(t, 40, _reader(codes), block=BLOCK)
    v = stream.view(t, ck, codes[BLOCK:], 1, ck.nblocks, None)
    assert v.values.shape == (0, 0)
    assert np.array_equal(v.alpha_ck, ck.alpha_ck[1:]) and np.array_equal(v.beta_ck, ck.beta_ck[1:])


# ----------------------------------------------------------------- built-in models
def _sampled(t, n, seed):
    """A record drawn by seqstate.engine.sampling (synthetic), encoded."""
    _, sym = sampling.sample_record(t, n, np.random.default_rng(seed))
    return api.encode_symbols(t, sym)


@pytest.mark.parametrize(
    ("name", "family", "n"), [("cpg-island", "small", 60_000), ("gene-segment", "sparse", 9_000)]
)
def test_builtin_models_on_sampled_records(name, family, n, kernel_switch):
    """The built-in models (cpg-island: small; gene-segment: sparse) with the label groups
    the pipeline asks for, default blocks, two threads."""
    model = load_model(name)
    with kernel_switch("specialised"):
        t = api.prepare(model)
        assert kernel_family(t) == family
        codes = _sampled(t, n, seed=17)
        labels = model.label_index()
        group, ng = labels, int(labels.max()) + 1
        block = api.default_block(n) if family == "small" else 500
        post = api.posterior(t, codes, group=group, n_groups=ng, block=block)
        ck = stream.checkpoints(t, n, _reader(codes), block=block, chunk=3001, threads=2,
                                group=group, n_groups=ng)  # fmt: skip
        _assert_checkpoints(ck, post)
        nb = ck.nblocks
        cuts = [0, 1, nb // 3, nb // 3 + 1, nb - 1, nb]
        for first, stop in zip(cuts[:-1], cuts[1:], strict=True):
            s0, e0 = ck.span_of(first, stop)
            got = stream.posterior_blocks(t, ck, codes[s0:e0], first, stop, group, ng, threads=2)
            assert np.array_equal(got, post.values[s0:e0])


def test_sparse_checkpoints_follow_the_grouping(kernel_switch):
    """gene-segment: the checkpoints of the default grouping equal api.posterior's
    default (per state) ones; those made for the label groups equal its grouped ones."""
    model = load_model("gene-segment")
    with kernel_switch("specialised"):
        t = api.prepare(model)
        assert kernel_family(t) == "sparse"
        n = 1500
        codes = _sampled(t, n, seed=4)
        ck = stream.checkpoints(t, n, _reader(codes), block=200)
        _assert_checkpoints(ck, api.posterior(t, codes, block=200))
        assert ck.key == b""
        labels = model.label_index()
        ng = int(labels.max()) + 1
        ckg = stream.checkpoints(t, n, _reader(codes), block=200, group=labels, n_groups=ng)
        _assert_checkpoints(ckg, api.posterior(t, codes, group=labels, n_groups=ng, block=200))
        assert ckg.key != b""


# ----------------------------------------------------------------- poisoned buffers
@pytest.mark.parametrize("name", FAMILIES)
def test_poisoned_buffers_change_nothing(name, random_model, kernel_switch):
    """With every work buffer poisoned (NaN), results equal the plain whole-record ones."""
    model, t = _tables(name, random_model, kernel_switch)
    n = 4 * BLOCK + 7
    with kernel_switch("specialised"):
        codes = _codes(model, t, n, seed=8)
        for group, ng in _groupings(model, t):
            with buffers.poisoning(False):
                post = api.posterior(t, codes, group=group, n_groups=ng, block=BLOCK)
            with buffers.poisoning(True):
                ck = stream.checkpoints(t, n, _reader(codes), block=BLOCK, chunk=9, threads=2,
                                        group=group, n_groups=ng)  # fmt: skip
                got = stream.posterior_blocks(t, ck, codes[BLOCK:], 1, ck.nblocks, group, ng,
                                              threads=2)  # fmt: skip
            _assert_checkpoints(ck, post)
            assert np.array_equal(got, post.values[BLOCK:])


# ----------------------------------------------------------------- impossible records
ALPHABET = "ACGT"


def _alternation():
    """Two states in strict alternation, s0 emits A, s1 emits C (small family)."""
    return make_model(
        name="alt",
        alphabet=ALPHABET,
        states=[State("a"), State("c")],
        start=np.array([1.0, 0.0]),
        transitions=np.array([[0.0, 1.0], [1.0, 0.0]]),
        emissions=np.array([[1.0, 0.0, 0.0, 0.0], [0.0, 1.0, 0.0, 0.0]]),
    )


def _ring(m=40):
    """A ring of ``m`` states, each emitting two bases (chain-sparse family)."""
    trans = np.zeros((m, m))
    for s in range(m):
        trans[s, (s + 1) % m] = 1.0
    em = np.zeros((m, 4))
    for s in range(m):
        em[s, [s % 4, (s + 1) % 4]] = [0.7, 0.3]
    start = np.zeros(m)
    start[0] = 1.0
    return make_model(
        name="ring",
        alphabet=ALPHABET,
        states=[State(f"s{i}") for i in range(m)],
        start=start,
        transitions=trans,
        emissions=em,
    )


def _ending():
    """Two states; only s1 may end the record, and only s0 emits A (no end after A)."""
    return make_model(
        name="ending",
        alphabet=ALPHABET,
        states=[State("a"), State("b")],
        start=np.array([0.5, 0.5]),
        transitions=np.array([[0.6, 0.4], [0.4, 0.4]]),
        emissions=np.array([[0.7, 0.1, 0.1, 0.1], [0.0, 0.4, 0.3, 0.3]]),
        end=np.array([0.0, 0.2]),
    )


def _impossible_cases():
    ring_good = "".join(ALPHABET[s % 4] for s in range(100))
    return [
        ("alt", _alternation, "ACAAC" + "AC" * 30, "specialised", "small"),
        ("alt-generic", _alternation, "ACAC" + "AC" * 20 + "AAC", "generic", "generic"),
        (
            "ring",
            _ring,
            ring_good[:57] + ALPHABET[59 % 4] + ring_good[58:],
            "specialised",
            "sparse",
        ),
        ("ending", _ending, "CGTA", "specialised", "small"),
        ("ending-generic", _ending, "CGTCA", "generic", "generic"),
    ]


@pytest.mark.parametrize("case", _impossible_cases(), ids=lambda c: c[0])
def test_impossible_record_raises_the_whole_record_error(case, kernel_switch):
    """The error of api.posterior (same message: record name and 1-based position, or the
    end of the record) for every chunk size, block and thread count."""
    _, build, seq, kind, family = case
    with kernel_switch(kind):
        t = api.prepare(build())
        assert kernel_family(t) == family
        codes = api.encode(t, seq)
        n = codes.shape[0]
        for block in (None, 4):
            with pytest.raises(ImpossibleSequenceError) as want:
                api.posterior(t, codes, block=block, record="chr9")
            for chunk in (3, 1 << 20):
                for threads in (1, 2):
                    with pytest.raises(ImpossibleSequenceError) as got:
                        stream.checkpoints(t, n, _reader(codes), block=block, chunk=chunk,
                                           threads=threads, record="chr9")  # fmt: skip
                    assert str(got.value) == str(want.value)
        assert "chr9" in str(want.value)


# ----------------------------------------------------------------- arguments
def test_bad_arguments_are_refused(random_model, kernel_switch):
    model, t = _tables("generic", random_model, kernel_switch)
    codes = _codes(model, t, 50, seed=1)
    with pytest.raises(ValueError, match="empty record"):
        stream.checkpoints(t, 0, _reader(codes))
    with pytest.raises(ValueError, match="threads"):
        stream.checkpoints(t, 50, _reader(codes), threads=0)
    with pytest.raises(ValueError, match="code reader gave"):
        stream.checkpoints(t, 50, lambda a, b: codes[a : b - 1])
    with pytest.raises(ValueError, match="group"):
        stream.checkpoints(t, 50, _reader(codes), group=np.zeros(2, np.int64), n_groups=1)
    ck = stream.checkpoints(t, 50, _reader(codes), block=BLOCK)
    with pytest.raises(ValueError, match="blocks"):
        stream.posterior_blocks(t, ck, codes, 2, 2)
    with pytest.raises(ValueError, match="blocks"):
        stream.posterior_blocks(t, ck, codes, 0, ck.nblocks + 1)
    with pytest.raises(ValueError, match="codes must hold"):
        stream.posterior_blocks(t, ck, codes[:10], 0, 1)
    with pytest.raises(ValueError, match="codes must hold"):
        stream.view(t, ck, codes[:10], 0, 1, None)


def test_a_failing_reader_stops_both_passes(random_model, kernel_switch):
    """An error of the code reader (here an OSError on one chunk of the backward pass)
    comes out of checkpoints as it is, with one or two threads; with two, the forward
    pass (made slow here: 5 ms per chunk) stops at its next chunk instead of reading on."""
    model, t = _tables("small", random_model, kernel_switch)
    n = 405
    codes = _codes(model, t, n, seed=6)
    for threads in (1, 2):
        forward: list[int] = []

        def read(a, b, forward=forward):
            if a % 10 == 0:  # a forward chunk (the backward ones start at 5 modulo 10)
                forward.append(a)
                time.sleep(0.005)
            if (a, b) == (195, 205):  # half way down the backward pass
                raise OSError("disk gone")
            return codes[a:b]

        with kernel_switch("specialised"):
            with pytest.raises(OSError, match="disk gone"):
                stream.checkpoints(t, n, read, block=BLOCK, chunk=10, threads=threads)
        # one thread: the backward pass runs first and fails before any forward chunk;
        # two: the forward pass stops early, not after all 41 chunks (how early depends
        # on how busy the machine is, so only "not all" is asserted)
        assert len(forward) < (1 if threads == 1 else 41)
