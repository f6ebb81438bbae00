"""The specialised kernels (seqstate.engine.small, seqstate.engine.sparse) and the tuned
generic kernels agree.

Three implementations are compared on random models and records:

* ``api`` -- what users call; it dispatches to :mod:`seqstate.engine.small` when
  every known symbol is emitted by at most two states, and to
  :mod:`seqstate.engine.sparse` for large models made mostly of chains (random
  chain models and the built-in gene-segment model); the dispatch is checked per
  case below, so a test cannot pass by silently running the generic kernel twice;
* the generic family (:mod:`seqstate.engine.generic`), called directly;
* the plain NumPy oracle :mod:`seqstate.engine.reference` (full lattices).

Posteriors and checkpoint vectors must agree within 1e-10, log-likelihoods within
1e-10 relative, Viterbi paths exactly (same tie rule) and Viterbi log
probabilities exactly between the two compiled implementations.  Models and
records are drawn from fixed seeds here (the tests' own parameters).
"""

from __future__ import annotations

import numpy as np
import pytest
from helpers import kernel_family, random_model, random_rows, sample_record

from seqstate.engine import (
    _common,
    api,
    reference,
    small,
    stream_paths,
)
from seqstate.engine.buffers import work_buffer
from seqstate.engine.generic import queries as kernels_query
from seqstate.errors import ImpossibleSequenceError
from seqstate.io.tables import load_model
from seqstate.model import State, make_model

ALPHABET = "ACGT"
BLOCKS = (1, 2, 7, None)  # None: one block holding the whole record


# ----------------------------------------------------------------- random cases
def _model(seed, m, order, with_end, p_forbid, narrow):
    """A random model (tests/helpers.py); ``narrow``: every symbol, in each context, has
    at most two emitters (the emitting states drawn anew per context)."""
    return random_model(
        np.random.default_rng(seed),
        n_states=m,
        order=order,
        with_end=with_end,
        p_forbid=p_forbid,
        max_emitters=2 if narrow else None,
        per_context=True,
    )


def _chain_model(seed, m, order, with_end):
    """A random chain-like model (tests/helpers.py, ``layout="chains"``)."""
    return random_model(
        np.random.default_rng(seed), n_states=m, order=order, with_end=with_end, layout="chains"
    )


def _record(rng, n, p_unknown=0.1, n_run=True):
    """Uniform letters with unknown bases (and one run of 10 N) mixed in (tests/helpers.py)."""
    return sample_record(rng, n, p_unknown=p_unknown, n_run=10 if n_run else 0).encode("ascii")


def _possible(tables, rng, n, p_unknown=0.1):
    """Codes of a record drawn from the model itself (tests/helpers.py sample_record: the
    encoder's context rule, never entering a state without successors, one run of 10 N),
    checked possible by the generic kernel."""
    seq = sample_record(rng, n, p_unknown=p_unknown, tables=tables, n_run=10)
    codes = api.encode(tables, seq)
    assert _generic_loglik(tables, codes)[1] == -1
    return codes


# ----------------------------------------------------------------- generic calls
def _limit(t):
    """The rescaling threshold the API uses for ``t`` (model-dependent, see kernels)."""
    return _common.rescale_limit(_common.smallest_factor(t.pred_p, t.E))


def _generic_loglik(t, codes):
    """The generic family's forward pass (its own rescaling threshold, see _limit)."""
    return t.generic.loglik(codes)


def _generic_posterior(t, codes, group, n_groups, block):
    """The generic family's whole-record posterior (backward pass, then the fused
    forward-and-combine sweep of seqstate.engine.passes)."""
    n = codes.shape[0]
    nb = (n + block - 1) // block
    m = t.n_states
    out = np.zeros((n, n_groups), dtype=np.float64)
    ack, bck = np.zeros((nb, m)), np.zeros((nb, m))
    alog, blog = np.zeros(nb), np.zeros(nb)
    ll, pos = t.generic.posterior(codes, group, n_groups, block, out, (ack, alog, bck, blog))
    return ll, pos, out, ack, alog, bck, blog


def _generic_viterbi(t, codes, block):
    """The generic family's Viterbi (the streaming kernels of seqstate.engine.generic.viterbi);
    (path, log probability, failing position 0-based or -1)."""
    try:
        lp, pieces = stream_paths.viterbi_pieces(
            t, codes.shape[0], lambda a, b: codes[a:b], block=block, generic=True
        )
    except ImpossibleSequenceError as err:
        return None, -np.inf, int(str(err).split("position ")[-1]) - 1
    path = np.zeros(codes.shape[0], dtype=np.int16)
    for piece in pieces:
        path[piece.start0 : piece.end0] = piece.states
    return path, lp, -1


def _log_vectors(vec, logs):
    """Natural logs of checkpoint rows (scaled vector times exp(log scale)); -inf for zeros."""
    with np.errstate(divide="ignore"):
        return np.log(vec) + logs[:, None]


def _close_logs(x, y, tol=1e-10):
    assert np.array_equal(np.isinf(x), np.isinf(y))
    fin = np.isfinite(x)
    scale = np.maximum(1.0, np.abs(y[fin]))
    assert np.all(np.abs(x[fin] - y[fin]) <= tol * scale)


CASES = [
    # (seed, states, order, end table, forbidden share, narrow emissions, length)
    (seed, m, k, end, pf, narrow, n)
    for seed, (m, k, end, pf, narrow, n) in enumerate(
        [
            (1, 0, False, 0.0, True, 1),
            (1, 2, True, 0.0, True, 2),
            (2, 0, False, 0.0, False, 1),
            (2, 1, False, 0.0, False, 2),
            (2, 1, True, 0.3, False, 257),
            (2, 2, False, 0.3, False, 400),
            (3, 0, False, 0.3, True, 300),
            (3, 1, True, 0.0, True, 123),
            (4, 2, False, 0.3, True, 350),
            (5, 0, True, 0.3, True, 64),
            (6, 1, False, 0.0, True, 500),
            (7, 2, True, 0.3, True, 211),
            (8, 0, False, 0.0, True, 600),
            (8, 1, True, 0.3, True, 300),
            (4, 1, False, 0.3, False, 150),  # dense emissions: generic kernel via api
            (8, 0, True, 0.0, False, 100),
        ]
    )
]


@pytest.mark.parametrize("seed,m,k,with_end,p_forbid,narrow,n", CASES)
def test_fast_equals_generic_equals_reference(
    seed, m, k, with_end, p_forbid, narrow, n, specialised
):
    model = _model(seed, m, k, with_end, p_forbid, narrow)
    t = api.prepare(model)
    sm = small.build(t)
    # the case is about the specialised kernels exactly when every symbol has <= 2 emitters
    assert (sm is not None) == (narrow or m <= 2)
    assert kernel_family(t) == ("small" if sm is not None else "generic")
    rng = np.random.default_rng(1000 + seed)
    codes = _possible(t, rng, n)
    n = codes.shape[0]
    lattice = t.E[codes]
    ref_ll, ref_post = reference.forward_backward(t.start, t.transitions, t.end, lattice)
    ref_path, ref_lp = reference.viterbi(t.start, t.transitions, t.end, lattice)

    ll = api.loglik(t, codes)
    gll, gpos = _generic_loglik(t, codes)
    assert gpos == -1
    assert abs(ll - gll) <= 1e-10 * abs(gll) + 1e-12
    assert abs(ll - ref_ll) <= 1e-10 * abs(ref_ll) + 1e-12

    group = model.label_index()
    for block in BLOCKS:
        blk = n if block is None else block
        p = api.posterior(t, codes, block=blk, dtype=np.float64)
        gl, gp, gout, gack, galog, gbck, gblog = _generic_posterior(
            t, codes, np.arange(m, dtype=np.int64), m, max(1, min(blk, n))
        )
        assert gp == -1
        assert abs(p.loglik - gl) <= 1e-10 * abs(gl) + 1e-12
        np.testing.assert_allclose(p.values, gout, rtol=0, atol=1e-10)
        np.testing.assert_allclose(p.values, ref_post, rtol=0, atol=1e-10)
        _close_logs(_log_vectors(p.alpha_ck, p.alpha_ck_log), _log_vectors(gack, galog))
        _close_logs(_log_vectors(p.beta_ck, p.beta_ck_log), _log_vectors(gbck, gblog))
        # per-label float32 output, as the pipeline asks for it
        n_labels = max(1, int(group.max()) + 1)  # unlabelled models: one empty column
        lab = api.posterior(t, codes, group=group, n_groups=n_labels, block=blk)
        assert lab.values.dtype == np.float32
        want = _group_oracle(ref_post, group, n_labels)
        np.testing.assert_allclose(lab.values, want, rtol=0, atol=2e-7)

        path, lp = api.viterbi(t, codes, block=blk)
        gpath, glp, gvp = _generic_viterbi(t, codes, max(1, min(blk, n)))
        assert gvp == -1
        assert np.array_equal(path, gpath)
        assert lp == glp
        assert np.array_equal(path, ref_path)
        assert abs(lp - ref_lp) <= 1e-10 * abs(ref_lp) + 1e-12


@pytest.mark.parametrize(
    "seed,m,k,with_end,p_forbid,narrow,n", [c for c in CASES if c[-1] >= 100][:6]
)
def test_checkpoints_serve_vector_queries(seed, m, k, with_end, p_forbid, narrow, n):
    """forward_vector/backward_vector on the fast checkpoints give the reference vectors.

    Reference: unscaled forward/backward vectors computed here by plain products
    of the model's matrices over the whole lattice (the recursions' definition).
    """
    model = _model(seed, m, k, with_end, p_forbid, narrow)
    t = api.prepare(model)
    codes = _possible(t, np.random.default_rng(2000 + seed), n)
    n = codes.shape[0]
    lattice = t.E[codes]
    # log forward / backward vectors by scaled recursion, kept per position
    la = np.empty((n, m))
    lb = np.empty((n, m))
    a = t.start * lattice[0]
    acc = 0.0
    for i in range(n):
        if i:
            a = (a @ t.transitions) * lattice[i]
        s = a.sum()
        a = a / s
        acc += np.log(s)
        with np.errstate(divide="ignore"):
            la[i] = np.log(a) + acc
    b = t.end.copy()
    acc = 0.0
    for i in range(n - 1, -1, -1):
        if i < n - 1:
            b = t.transitions @ (lattice[i + 1] * b)
        s = b.sum()
        b = b / s
        acc += np.log(s)
        with np.errstate(divide="ignore"):
            lb[i] = np.log(b) + acc
    post = api.posterior(t, codes, block=7)
    for pos in sorted({0, 1, 6, 7, 8, n // 2, n - 2, n - 1}):
        if not 0 <= pos < n:
            continue
        vec, lg = api.forward_vector(t, codes, post, pos)
        with np.errstate(divide="ignore"):
            _close_logs(np.log(vec) + lg, la[pos], tol=1e-9)
        vec, lg = api.backward_vector(t, codes, post, pos)
        with np.errstate(divide="ignore"):
            _close_logs(np.log(vec) + lg, lb[pos], tol=1e-9)


@pytest.mark.parametrize("name", ["cpg-island", "cpg-island-8"])
def test_builtin_models_use_the_fast_kernels(name, specialised):
    """Both CpG layouts fit the two-emitters kernels, N runs included; results match generic."""
    model = load_model(name)
    t = api.prepare(model)
    sm = small.build(t)
    assert sm is not None and kernel_family(t) == "small"
    rng = np.random.default_rng(7)
    seq = bytearray(_record(rng, 20000, p_unknown=0.01))
    seq[100:400] = b"N" * 300
    seq[0] = ord("N")
    seq[-1] = ord("n")
    codes = api.encode(t, bytes(seq))
    group = model.label_index()
    for block in (1, 7, 1000, codes.shape[0]):
        p = api.posterior(t, codes, group=group, n_groups=1, block=block, dtype=np.float64)
        gl, gp, gout, *_ = _generic_posterior(t, codes, group, 1, block)
        assert abs(p.loglik - gl) <= 1e-10 * abs(gl)
        np.testing.assert_allclose(p.values, gout, rtol=0, atol=1e-10)
        path, lp = api.viterbi(t, codes, block=block)
        gpath, glp, _ = _generic_viterbi(t, codes, block)
        assert np.array_equal(path, gpath) and lp == glp
    assert abs(api.loglik(t, codes) - _generic_loglik(t, codes)[0]) <= 1e-10 * abs(gl)


def test_two_layouts_give_the_same_label_posteriors():
    """cpg-island (2 states, order 1) and cpg-island-8 (its one-state-per-base layout)."""
    rng = np.random.default_rng(3)
    seq = _record(rng, 5000, p_unknown=0.0, n_run=False)
    out = []
    for name in ("cpg-island", "cpg-island-8"):
        model = load_model(name)
        t = api.prepare(model)
        codes = api.encode(t, seq)
        out.append(api.posterior(t, codes, group=model.label_index(), n_groups=1, dtype=np.float64))
    assert abs(out[0].loglik - out[1].loglik) <= 1e-9 * abs(out[0].loglik)
    np.testing.assert_allclose(out[0].values, out[1].values, rtol=0, atol=1e-9)


def test_viterbi_ties_go_to_the_lowest_state(specialised):
    """Two identical states tie at every step: the path must stay in state 0 (documented rule)."""
    trans = np.array([[0.45, 0.45, 0.10], [0.45, 0.45, 0.10], [0.3, 0.3, 0.4]])
    em = np.array([[0.5, 0.5, 0.0, 0.0], [0.5, 0.5, 0.0, 0.0], [0.0, 0.0, 0.5, 0.5]])
    model = make_model(
        name="ties",
        alphabet=ALPHABET,
        states=[State(f"s{i}") for i in range(3)],
        start=np.array([0.4, 0.4, 0.2]),
        transitions=trans,
        emissions=em,
    )
    t = api.prepare(model)
    assert small.build(t) is not None and kernel_family(t) == "small"
    codes = api.encode(t, b"AACAGTNNACGA")
    for block in (1, 2, 7, 12):
        path, lp = api.viterbi(t, codes, block=block)
        gpath, glp, _ = _generic_viterbi(t, codes, block)
        assert np.array_equal(path, gpath) and lp == glp
        assert set(path[np.isin(codes, [0, 1])].tolist()) == {0}
        ref_path, _ = reference.viterbi(t.start, t.transitions, t.end, t.E[codes])
        assert np.array_equal(path, ref_path)


def test_impossible_record_is_reported_with_its_position(specialised):
    """A base no state can emit after a forced state: same error as the generic kernels."""
    trans = np.array([[0.0, 1.0], [1.0, 0.0]])  # strict alternation
    em = np.array([[1.0, 0.0, 0.0, 0.0], [0.0, 1.0, 0.0, 0.0]])  # s0 emits A, s1 emits C
    model = make_model(
        name="alt",
        alphabet=ALPHABET,
        states=[State("a"), State("c")],
        start=np.array([1.0, 0.0]),
        transitions=trans,
        emissions=em,
    )
    t = api.prepare(model)
    assert small.build(t) is not None and kernel_family(t) == "small"
    good = api.encode(t, b"ACACNC")
    assert np.isfinite(api.loglik(t, good))
    bad = api.encode(t, b"ACAAC")  # position 4 (1-based) cannot be A
    for call in (
        lambda: api.loglik(t, bad),
        lambda: api.posterior(t, bad),
        lambda: api.viterbi(t, bad),
        lambda: api.posterior(t, bad, block=2),
        lambda: api.viterbi(t, bad, block=2),
    ):
        with pytest.raises(ImpossibleSequenceError, match="position 4"):
            call()
    assert _generic_loglik(t, bad)[1] == 3


# ----------------------------------------------------------------- chain-sparse kernels
# seqstate.engine.sparse serves large models made mostly of chains (each state with one
# predecessor and one successor).  The cases below build such models at random (the
# tests' own parameters), check that the API really dispatches to those kernels, and
# compare them with the plain NumPy oracle (seqstate.engine.reference, full lattices)
# and with the generic kernels called directly.  Viterbi paths must be identical to
# both and its log probability identical to the generic kernel's; posteriors within
# 1e-10.


@pytest.fixture
def specialised(monkeypatch):
    """The API's normal dispatch, even when the run sets SEQSTATE_KERNELS=generic."""
    monkeypatch.setattr(api, "_USE_SMALL", True)
    monkeypatch.delenv("SEQSTATE_KERNELS", raising=False)


def _sparse_kernels_used(t):
    """The API serves ``t`` with the chain-sparse kernels (checked, so that a test cannot
    pass by running the generic kernels twice)."""
    return kernel_family(t) == "sparse"


def _group_oracle(ref_post, group, n_groups):
    return np.stack([ref_post[:, group == k].sum(axis=1) for k in range(n_groups)], axis=1)


def _close_to_row_max(x, y, tol):
    """|x - y| <= tol * max(y) per row: vectors whose smallest entries lie below the
    float64 range (scaled forward / backward vectors of long chains) agree where it
    matters, and a denormal entry may round differently."""
    x = np.atleast_2d(x)
    y = np.atleast_2d(y)
    assert np.all(np.abs(x - y) <= tol * np.max(np.abs(y), axis=1, keepdims=True))


def _unscaled(vec, logs, ref_logs):
    """Checkpoint rows as multiples of exp(ref_logs): comparable across scalings."""
    return vec * np.exp(logs - ref_logs)[:, None]


def _check_sparse_against_oracles(model, t, codes, blocks):
    m = t.n_states
    n = codes.shape[0]
    lattice = t.E[codes]
    ref_ll, ref_post = reference.forward_backward(t.start, t.transitions, t.end, lattice)
    ref_path, ref_lp = reference.viterbi(t.start, t.transitions, t.end, lattice)

    ll = api.loglik(t, codes)
    gll, gpos = _generic_loglik(t, codes)
    assert gpos == -1
    assert abs(ll - gll) <= 1e-10 * abs(gll)
    assert abs(ll - ref_ll) <= 1e-10 * abs(ref_ll)  # seqstate.engine.reference oracle

    labels = model.label_index()
    n_labels = int(labels.max()) + 1
    for block in blocks:
        blk = n if block is None else max(1, min(block, n))
        p = api.posterior(t, codes, block=blk, dtype=np.float64)
        gl, gp, gout, gack, galog, gbck, gblog = _generic_posterior(
            t, codes, np.arange(m, dtype=np.int64), m, blk
        )
        assert gp == -1
        assert abs(p.loglik - gl) <= 1e-10 * abs(gl)
        np.testing.assert_allclose(p.values, gout, rtol=0, atol=1e-10)
        # seqstate.engine.reference plain-NumPy oracle (full forward-backward)
        np.testing.assert_allclose(p.values, ref_post, rtol=0, atol=1e-10)
        _close_to_row_max(_unscaled(p.alpha_ck, p.alpha_ck_log, galog), gack, 1e-9)
        _close_to_row_max(_unscaled(p.beta_ck, p.beta_ck_log, gblog), gbck, 1e-9)
        # per-label output (few columns: its own numbering), float32 and float64
        lab = api.posterior(t, codes, group=labels, n_groups=n_labels, block=blk)
        assert lab.values.dtype == np.float32
        want = _group_oracle(ref_post, labels, n_labels)
        np.testing.assert_allclose(lab.values, want, rtol=0, atol=2e-7)
        lab64 = api.posterior(
            t, codes, group=labels, n_groups=n_labels, block=blk, dtype=np.float64
        )
        np.testing.assert_allclose(lab64.values, want, rtol=0, atol=1e-10)
        assert abs(lab64.loglik - ref_ll) <= 1e-10 * abs(ref_ll)

        path, lp = api.viterbi(t, codes, block=blk)
        gpath, glp, gvp = _generic_viterbi(t, codes, blk)
        assert gvp == -1
        assert np.array_equal(path, gpath)
        assert lp == glp
        assert np.array_equal(path, ref_path)  # seqstate.engine.reference oracle
        assert abs(lp - ref_lp) <= 1e-10 * abs(ref_lp)
    # default block: the whole record's back-pointers in one pass
    path, lp = api.viterbi(t, codes)
    assert np.array_equal(path, ref_path) and lp == _generic_viterbi(t, codes, n)[1]


CHAIN_CASES = [
    # (seed, states, order, end table, length)
    (11, 120, 0, False, 500),
    (12, 200, 1, True, 400),
    (13, 300, 2, False, 300),
    (14, 150, 3, True, 600),
    (15, 64, 2, True, 257),
]


@pytest.mark.parametrize("seed,m,k,with_end,n", CHAIN_CASES)
def test_chain_sparse_equals_generic_equals_reference(seed, m, k, with_end, n, specialised):
    model = _chain_model(seed, m, k, with_end)
    t = api.prepare(model)
    assert small.build(t) is None and _sparse_kernels_used(t)
    indeg = np.diff(t.pred_ptr)
    assert (indeg == 0).any() and (indeg > 1).any()  # the dummy slot and searched lists
    if with_end:
        assert (np.diff(t.succ_ptr) == 0).any()
    codes = _possible(t, np.random.default_rng(3000 + seed), n)
    _check_sparse_against_oracles(model, t, codes, BLOCKS)


def test_chain_sparse_checkpoints_serve_vector_queries(specialised):
    """forward_vector/backward_vector on the chain-sparse checkpoints.

    Reference: forward and backward vectors by plain products of the model's dense
    matrices over the lattice (the recursions' definition), rescaled each step.
    """
    model = _chain_model(21, 180, 2, True)
    t = api.prepare(model)
    assert _sparse_kernels_used(t)
    codes = _possible(t, np.random.default_rng(21), 400)
    n = codes.shape[0]
    lattice = t.E[codes]
    fa, fl = np.empty((n, t.n_states)), np.empty(n)
    a, acc = t.start * lattice[0], 0.0
    for i in range(n):
        if i:
            a = (a @ t.transitions) * lattice[i]
        s = a.sum()
        a, acc = a / s, acc + np.log(s)
        fa[i], fl[i] = a, acc
    ba, bl = np.empty((n, t.n_states)), np.empty(n)
    b, acc = t.end.copy(), 0.0
    for i in range(n - 1, -1, -1):
        if i < n - 1:
            b = t.transitions @ (lattice[i + 1] * b)
        s = b.sum()
        b, acc = b / s, acc + np.log(s)
        ba[i], bl[i] = b, acc
    post = api.posterior(t, codes, block=7)
    for pos in (0, 1, 6, 7, 8, n // 2, n - 2, n - 1):
        vec, lg = api.forward_vector(t, codes, post, pos)
        _close_to_row_max(vec * np.exp(lg - fl[pos]), fa[pos], 1e-9)
        vec, lg = api.backward_vector(t, codes, post, pos)
        _close_to_row_max(vec * np.exp(lg - bl[pos]), ba[pos], 1e-9)


def _twin_chains_model(length):
    """A hub with a self-loop and two identical chains out of it and back: every path
    through one chain ties with its twin through the other, at every step."""
    m = 1 + 2 * length
    rng = np.random.default_rng(5)
    order = np.random.default_rng(6).permutation(m)  # shuffled indices
    hub, one, two = int(order[0]), order[1 : 1 + length], order[1 + length :]
    trans = np.zeros((m, m))
    trans[hub, hub] = 0.5
    trans[hub, one[0]] = trans[hub, two[0]] = 0.25
    em = np.zeros((m, 4))
    em[hub] = [0.25, 0.25, 0.25, 0.25]
    for j in range(length):
        row = random_rows(rng, (4,), 0.3)
        em[one[j]] = em[two[j]] = row
        nxt = hub if j == length - 1 else None
        trans[one[j], one[j + 1] if nxt is None else hub] = 1.0
        trans[two[j], two[j + 1] if nxt is None else hub] = 1.0
    start = np.zeros(m)
    start[hub] = 1.0
    return make_model(
        name="twins",
        alphabet=ALPHABET,
        states=[State(f"s{i}") for i in range(m)],
        start=start,
        transitions=trans,
        emissions=em,
    )


def test_chain_sparse_viterbi_ties_go_to_the_lowest_state(specialised):
    """Exact ties everywhere: same tie rule as the generic kernel and the reference
    (lowest from-state index among equal predecessors, lowest final state)."""
    model = _twin_chains_model(20)
    t = api.prepare(model)
    assert _sparse_kernels_used(t)
    rng = np.random.default_rng(9)
    codes = _possible(t, rng, 700, p_unknown=0.05)
    lattice = t.E[codes]
    ref_path, _ = reference.viterbi(t.start, t.transitions, t.end, lattice)
    for block in (1, 2, 7, 100, None):
        blk = codes.shape[0] if block is None else block
        path, lp = api.viterbi(t, codes, block=blk)
        gpath, glp, _ = _generic_viterbi(t, codes, blk)
        assert np.array_equal(path, gpath) and lp == glp
        assert np.array_equal(path, ref_path)  # seqstate.engine.reference oracle
    # the ties really happened: the path enters the lower-index chain each time
    one_first = model.transitions[np.flatnonzero(model.start)[0]]
    entries = np.flatnonzero(one_first > 0)
    entries = entries[entries != np.flatnonzero(model.start)[0]]
    visited = set(path.tolist())
    assert int(entries.min()) in visited and int(entries.max()) not in visited


def test_chain_sparse_viterbi_checkpointed_when_pointers_exceed_budget(monkeypatch, specialised):
    """Above the back-pointer budget the default Viterbi checkpoints: the same path."""
    model = _chain_model(31, 100, 1, False)
    t = api.prepare(model)
    assert _sparse_kernels_used(t)
    codes = _possible(t, np.random.default_rng(31), 900)
    one_pass = api.viterbi(t, codes)
    monkeypatch.setattr(stream_paths, "BACKPOINTER_BUDGET", 16)
    checkpointed = api.viterbi(t, codes)
    assert np.array_equal(one_pass[0], checkpointed[0]) and one_pass[1] == checkpointed[1]
    gpath, glp, _ = _generic_viterbi(t, codes, api.default_block(codes.shape[0]))
    assert np.array_equal(checkpointed[0], gpath) and checkpointed[1] == glp


def test_chain_sparse_impossible_record_reports_the_generic_positions(specialised):
    """A base no state can emit: same error, and the kernels' failure positions are
    those of the generic kernels (forward, posterior and Viterbi)."""
    m = 40
    trans = np.zeros((m, m))
    for s in range(m):
        trans[s, (s + 1) % m] = 1.0  # one ring: each state one predecessor, one successor
    em = np.zeros((m, 4))
    for s in range(m):
        em[s, [s % 4, (s + 1) % 4]] = [0.7, 0.3]
    start = np.zeros(m)
    start[0] = 1.0
    model = make_model(
        name="ring",
        alphabet=ALPHABET,
        states=[State(f"s{i}") for i in range(m)],
        start=start,
        transitions=trans,
        emissions=em,
    )
    t = api.prepare(model)
    assert _sparse_kernels_used(t)
    good = "".join(ALPHABET[s % 4] for s in range(100))
    assert np.isfinite(api.loglik(t, api.encode(t, good)))
    bad = api.encode(t, good[:57] + ALPHABET[(57 + 2) % 4] + good[58:])  # position 58 1-based
    for call in (
        lambda: api.loglik(t, bad),
        lambda: api.posterior(t, bad),
        lambda: api.viterbi(t, bad),
        lambda: api.posterior(t, bad, block=5),
        lambda: api.viterbi(t, bad, block=5),
        lambda: api.viterbi(t, bad, block=1),
    ):
        with pytest.raises(ImpossibleSequenceError, match="position 58"):
            call()
    assert t.backend.loglik(bad)[1] == _generic_loglik(t, bad)[1]
    for block in (1, 5, 1000):
        assert _generic_viterbi(t, bad, block)[2] == 57


# ----------------------------------------------------------------- the gene-segment model
def test_gene_segment_uses_the_chain_sparse_kernels_and_matches_the_reference(specialised):
    """The built-in gene-segment model on short records (one drawn from the model, one
    uniform), against the dense NumPy oracle and the generic kernels."""
    model = load_model("gene-segment")
    t = api.prepare(model)
    assert small.build(t) is None and _sparse_kernels_used(t)
    rng = np.random.default_rng(2024)
    drawn = _possible(t, rng, 2000, p_unknown=0.002)
    uniform = api.encode(t, _record(rng, 2000, p_unknown=0.01))
    for codes in (drawn, uniform):
        _check_sparse_against_oracles(model, t, codes, (7, 1000, None))


def test_gene_segment_track_groups_posterior(specialised):
    """The pipeline's per-(label, strand) columns, float32, against the oracle."""
    from seqstate.kinds import group_index, track_groups

    model = load_model("gene-segment")
    t = api.prepare(model)
    groups = track_groups(model)
    gi = group_index(model, groups)
    codes = _possible(t, np.random.default_rng(77), 2000, p_unknown=0.0)
    lattice = t.E[codes]
    ref_ll, ref_post = reference.forward_backward(t.start, t.transitions, t.end, lattice)
    p = api.posterior(t, codes, group=gi, n_groups=len(groups))
    # seqstate.engine.reference plain-NumPy oracle, summed per group
    np.testing.assert_allclose(
        p.values, _group_oracle(ref_post, gi, len(groups)), rtol=0, atol=2e-7
    )
    assert abs(p.loglik - ref_ll) <= 1e-10 * abs(ref_ll)


# ----------------------------------------------------------------- restricted forward
def _restricted_oracle(t, codes, s0, e0, init, init_is_start, mask, use_emissions):
    """log of the summed restricted forward vector, by dense NumPy products (the
    recursion's definition: only masked states, from ``init`` at s0 - 1 or the start)."""
    lattice = t.E[codes] if use_emissions else np.ones((codes.shape[0], t.n_states))
    keep = mask.astype(float)
    a = (init if init_is_start else init @ t.transitions) * lattice[s0] * keep
    acc = 0.0
    for i in range(s0 + 1, e0):
        s = a.sum()
        if s == 0:
            return -np.inf
        a, acc = a / s, acc + np.log(s)
        a = (a @ t.transitions) * lattice[i] * keep
    s = a.sum()
    return np.log(s) + acc if s > 0 else -np.inf


@pytest.mark.parametrize("name", ["gene-segment", "chains"])
def test_restricted_forward_masked_path_matches_plain_and_oracle(name):
    """Large models take the masked-list restricted forward: same values as the
    small-model loop (called directly) and as the dense NumPy oracle above."""
    model = load_model(name) if name != "chains" else _chain_model(41, 160, 2, True)
    t = api.prepare(model)
    assert t.n_states >= kernels_query.RESTRICTED_MASKED_MIN
    rng = np.random.default_rng(41)
    codes = _possible(t, rng, 1500, p_unknown=0.01)
    post = api.posterior(t, codes)
    labels = model.label_index()
    for s0, e0 in ((0, 40), (100, 900), (700, 701), (1200, 1500)):
        if s0 == 0:
            init, is_start = t.start, True
        else:
            init, _ = api.forward_vector(t, codes, post, s0 - 1)
            is_start = False
        for mask in (labels == 0, labels != 0, np.ones(t.n_states, dtype=bool)):
            for use_e in (True, False):
                got = work_buffer(t.n_states)
                lg = kernels_query.restricted_forward(
                    codes,
                    s0,
                    e0,
                    init,
                    is_start,
                    mask,
                    use_e,
                    t.E,
                    t.nz_ptr,
                    t.nz_state,
                    t.pred_ptr,
                    t.pred_src,
                    t.pred_p,
                    got,
                    *kernels_query.restricted_scratch(t.n_states, t.pred_src.shape[0]),
                )
                plain = work_buffer(t.n_states)
                lp = kernels_query._restricted_plain(
                    codes,
                    s0,
                    e0,
                    init,
                    is_start,
                    mask,
                    use_e,
                    t.E,
                    t.nz_ptr,
                    t.nz_state,
                    t.pred_ptr,
                    t.pred_src,
                    t.pred_p,
                    plain,
                )
                want = _restricted_oracle(t, codes, s0, e0, init, is_start, mask, use_e)
                if want == -np.inf:
                    assert lg == lp == -np.inf
                    continue
                total = np.log(got.sum()) + lg
                assert abs(total - (np.log(plain.sum()) + lp)) <= 1e-10 * max(1.0, abs(total))
                # dense NumPy oracle (restricted recursion by matrix products)
                assert abs(total - want) <= 1e-10 * max(1.0, abs(want))
                _close_to_row_max(got * np.exp(lg - lp), plain, 1e-10)


# ----------------------------------------------------------------- chain-sparse segment queries
def _generic_segment_scores(monkeypatch, t, codes, queries, block):
    """Segment log probabilities and log-odds by the generic kernels (the oracle), each
    query on a fresh posterior."""
    monkeypatch.setattr(api, "_USE_SMALL", False)
    assert kernel_family(t) == "generic"  # really the generic path
    post = api.posterior(t, codes, block=block, dtype=np.float64)
    out = [
        (
            api.segment_log_probability(t, codes, post, s0, e0, mask),
            api.segment_log_odds(t, codes, post, s0, e0, mask),
        )
        for s0, e0, mask in queries
    ]
    vecs = [
        (api.forward_vector(t, codes, post, p), api.backward_vector(t, codes, post, p))
        for p in range(0, codes.shape[0], 97)
    ]
    monkeypatch.setattr(api, "_USE_SMALL", True)
    return out, vecs


def _same_score(x, y, tol=1e-10):
    if not np.isfinite(y):
        return x == y or (np.isnan(x) and np.isnan(y))
    return abs(x - y) <= tol * max(1.0, abs(y))


def _segment_queries(t, model, rng, n, count):
    labels = model.label_index()
    masks = [
        labels == 0,
        labels != 0,
        np.ones(t.n_states, dtype=bool),
        rng.random(t.n_states) < 0.9,
    ]
    out = [(0, 1, masks[0]), (0, n, masks[2]), (n - 1, n, masks[1]), (0, 37, masks[1])]
    for _ in range(count):
        s0 = int(rng.integers(0, n))
        longest = 4 if rng.random() < 0.5 else 300  # short ones are rarely certain
        e0 = int(min(n, s0 + rng.integers(1, longest)))
        out.append((s0, e0, masks[int(rng.integers(len(masks)))]))
    return out


@pytest.mark.parametrize(
    "name,seed,n,block",
    [
        ("chains", 51, 900, 64),
        ("chains", 52, 700, 1),
        ("gene-segment", 53, 3000, 200),
        ("gene-segment", 54, 2500, None),
    ],
)
def test_chain_sparse_segment_queries_equal_generic(monkeypatch, name, seed, n, block):
    """segment_log_probability / segment_log_odds / forward_vector / backward_vector on
    the chain-sparse path (which keeps the last recomputed vectors between queries)
    against the generic kernels as oracle; queries in position order, reversed and
    shuffled, so that the reuse of vectors cannot change a result."""
    model = load_model(name) if name != "chains" else _chain_model(seed, 150, 2, True)
    monkeypatch.setattr(api, "_USE_SMALL", True)
    t = api.prepare(model)
    assert _sparse_kernels_used(t)
    rng = np.random.default_rng(seed)
    codes = _possible(t, rng, n, p_unknown=0.01)
    queries = _segment_queries(t, model, rng, n, 60)
    want, want_vecs = _generic_segment_scores(monkeypatch, t, codes, queries, block)
    assert any(np.isfinite(lp) and lp < -1e-3 for lp, _ in want)  # informative cases
    assert any(lp == -np.inf for lp, _ in want)  # and impossible ones
    post = api.posterior(t, codes, block=block, dtype=np.float64)
    assert post.cursor is None
    for order in (
        np.argsort([q[0] for q in queries], kind="stable"),
        np.arange(len(queries))[::-1],
        rng.permutation(len(queries)),
    ):
        for j in order:
            s0, e0, mask = queries[j]
            lp = api.segment_log_probability(t, codes, post, s0, e0, mask)
            lo = api.segment_log_odds(t, codes, post, s0, e0, mask)
            # generic kernels as oracle
            assert _same_score(lp, want[j][0]), (j, lp, want[j][0])
            assert _same_score(lo, want[j][1]), (j, lo, want[j][1])
    assert post.cursor is not None  # the chain-sparse path really ran
    for k, p in enumerate(range(0, n, 97)):
        (fv, fl), (bv, bl) = (
            api.forward_vector(t, codes, post, p),
            api.backward_vector(t, codes, post, p),
        )
        (gfv, gfl), (gbv, gbl) = want_vecs[k]
        # generic kernels as oracle (vectors compared unscaled, relative to their maximum)
        _close_to_row_max(fv * np.exp(fl - gfl), gfv, 1e-10)
        _close_to_row_max(bv * np.exp(bl - gbl), gbv, 1e-10)


@pytest.mark.parametrize("block", [40, 300, 1000])
def test_cursor_snapshots_equal_one_pass_from_the_checkpoint(monkeypatch, block):
    """The chain-sparse cursor's forward and backward vectors (from the snapshots it keeps
    inside a block, or continued from its last query) are, to the bit, those of one pass
    from the block's checkpoint, whatever the order of the queries."""
    from seqstate.engine.sparse import queries as sparse_query

    model = load_model("gene-segment")
    monkeypatch.setattr(api, "_USE_SMALL", True)
    t = api.prepare(model)
    assert _sparse_kernels_used(t)
    rng = np.random.default_rng(block)
    n = 2500
    codes = _possible(t, rng, n, p_unknown=0.01)
    post = api.posterior(t, codes, block=block, dtype=np.float64)
    cur = api.backend_of(t).cursor(codes, post)
    sp = cur.sp

    def one_pass(pos, forward):
        bk = pos // post.block
        rows = np.zeros_like(cur.b)
        if forward:
            sparse_query.to_slots(post.alpha_ck[bk], sp.perm, rows, 0)
            ex = sparse_query.forward_advance(codes, bk * post.block, pos, rows, *sp.fwd, cur.lim)
            return rows[0].copy(), float(post.alpha_ck_log[bk]) + ex * np.log(2.0)
        sparse_query.to_slots(post.beta_ck[bk], sp.perm, rows, 0)
        top = min(n, bk * post.block + post.block) - 1
        ex = sparse_query.backward_advance(codes, top, pos, rows, *sp.bwd, cur.lim)
        return rows[0].copy(), float(post.beta_ck_log[bk]) + ex * np.log(2.0)

    positions = list(rng.integers(0, n, 150)) + list(range(0, n, 7))
    rng.shuffle(positions)
    sorted_run = sorted(int(p) for p in rng.integers(0, n, 100))
    for pos in [*positions, *sorted_run, *sorted_run[::-1]]:
        for forward in (True, False):
            vec, lg = cur.forward(int(pos)) if forward else cur.backward(int(pos))
            want, want_log = one_pass(int(pos), forward)
            assert np.array_equal(vec[0], want), (pos, forward)
            assert lg == want_log, (pos, forward)  # one sum of the exponents, as one pass


@pytest.mark.parametrize("block", [17, 40, 333])
def test_sparse_span_in_sub_blocks_is_the_same_to_the_bit(monkeypatch, block):
    """The chain-sparse posterior swept in sub-blocks (what blocks over SPAN_SWEEP_MAX get)
    gives exactly the values of one sweep per block, and matches the generic kernels."""
    from seqstate.engine.sparse import posterior as sparse_posterior

    model = load_model("gene-segment")
    monkeypatch.setattr(api, "_USE_SMALL", True)
    t = api.prepare(model)
    assert _sparse_kernels_used(t)
    rng = np.random.default_rng(block)
    codes = _possible(t, rng, 3000, p_unknown=0.01)
    group = np.arange(t.n_states) % 5
    one = api.posterior(t, codes, group=group, n_groups=5, block=block, dtype=np.float64)
    for rows in (1, 2, 7, block - 1):
        monkeypatch.setattr(sparse_posterior, "SPAN_SWEEP_MAX", 8)
        monkeypatch.setattr(sparse_posterior, "SPAN_ROWS", rows)
        sub = api.posterior(t, codes, group=group, n_groups=5, block=block, dtype=np.float64)
        assert np.array_equal(sub.values, one.values), rows
        assert sub.loglik == one.loglik
    monkeypatch.setattr(api, "_USE_SMALL", False)
    ref = api.posterior(t, codes, group=group, n_groups=5, block=block, dtype=np.float64)
    # the generic kernels as oracle
    np.testing.assert_allclose(one.values, ref.values, rtol=0, atol=1e-9)


def test_chain_sparse_restricted_equals_generic_kernel(specialised):
    """The chain-sparse backend's restricted forward against kernels_query.restricted_forward
    (the generic kernel as oracle), with and without emissions."""
    model = _chain_model(61, 140, 1, False)
    t = api.prepare(model)
    assert _sparse_kernels_used(t)
    rng = np.random.default_rng(61)
    codes = _possible(t, rng, 800, p_unknown=0.02)
    post = api.posterior(t, codes, block=50)
    labels = model.label_index()
    for s0, e0 in ((0, 30), (1, 2), (99, 400), (500, 800)):
        if s0 == 0:
            init, is_start = t.start, True
        else:
            init, _ = api.forward_vector(t, codes, post, s0 - 1)
            is_start = False
        for mask in (labels == 0, labels != 0, np.ones(t.n_states, dtype=bool)):
            for use_e in (True, False):
                got, lg = t.backend.restricted(codes, s0, e0, init, is_start, mask, use_e)
                ref = work_buffer(t.n_states)
                rl = kernels_query.restricted_forward(
                    codes,
                    s0,
                    e0,
                    init,
                    is_start,
                    mask,
                    use_e,
                    t.E,
                    t.nz_ptr,
                    t.nz_state,
                    t.pred_ptr,
                    t.pred_src,
                    t.pred_p,
                    ref,
                    *kernels_query.restricted_scratch(t.n_states, t.pred_src.shape[0]),
                )
                if rl == -np.inf:
                    assert lg == -np.inf
                    continue
                # generic restricted_forward as oracle
                _close_to_row_max(got * np.exp(lg - rl), ref, 1e-10)


# ----------------------------------------------------------------- the choice of family
def test_prepare_chooses_the_family_once_and_names_it(monkeypatch):
    """prepare(kernels=...) picks the family; tables.kernels names the one that runs."""
    monkeypatch.delenv("SEQSTATE_KERNELS", raising=False)
    two, chains = load_model("cpg-island"), _chain_model(71, 150, 2, True)
    assert api.prepare(two).kernels == "small"
    assert api.prepare(chains).kernels == "sparse"
    assert api.prepare(two, kernels="generic").kernels == "generic"
    assert api.prepare(chains, kernels="sparse").kernels == "sparse"
    with pytest.raises(ValueError, match="does not fit the sparse kernels"):
        api.prepare(two, kernels="sparse")
    with pytest.raises(ValueError, match="does not fit the small kernels"):
        api.prepare(chains, kernels="small")
    with pytest.raises(ValueError, match="kernels must be one of"):
        api.prepare(two, kernels="fast")
    # the environment variable is only the default of the argument
    monkeypatch.setenv("SEQSTATE_KERNELS", "generic")
    assert api.prepare(two).kernels == "generic"
    assert api.prepare(two, kernels="auto").kernels == "small"


@pytest.mark.parametrize("name", ["cpg-island-8", "chains"])
def test_named_family_agrees_with_generic(specialised, name):
    """The specialised family chosen by name against the generic family on one record
    (the generic kernels as oracle)."""
    model = load_model(name) if name != "chains" else _chain_model(72, 120, 2, True)
    fast = api.prepare(model, kernels="small" if name != "chains" else "sparse")
    slow = api.prepare(model, kernels="generic")
    assert (fast.kernels, slow.kernels) == ("small" if name != "chains" else "sparse", "generic")
    rng = np.random.default_rng(72)
    codes = _possible(fast, rng, 1500, p_unknown=0.01)
    lf, ls = api.loglik(fast, codes), api.loglik(slow, codes)
    assert abs(lf - ls) <= 1e-10 * abs(ls)
    pf = api.posterior(fast, codes, dtype=np.float64)
    ps = api.posterior(slow, codes, dtype=np.float64)
    np.testing.assert_allclose(pf.values, ps.values, rtol=0, atol=1e-10)
    (path_f, lp_f), (path_s, lp_s) = api.viterbi(fast, codes), api.viterbi(slow, codes)
    assert np.array_equal(path_f, path_s) and lp_f == lp_s  # Viterbi is bit-identical
