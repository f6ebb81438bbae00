"""The specialised kernels (seqstate.engine.small) and the tuned generic kernels agree.

Three implementations are compared on random small models and records:

* ``api`` -- what users call; it dispatches to :mod:`seqstate.engine.small` when
  every known symbol is emitted by at most two states (checked per case below, so
  a test cannot pass by silently running the generic kernel twice);
* the generic kernels of :mod:`seqstate.engine.kernels`, called directly;
* the plain NumPy oracle :mod:`seqstate.engine.reference` (full lattices).

Posteriors and checkpoint vectors must agree within 1e-10, log-likelihoods within
1e-10 relative, Viterbi paths exactly (same tie rule) and Viterbi log
probabilities exactly between the two compiled implementations.  Models and
records are drawn from fixed seeds here (the tests' own parameters).
"""

from __future__ import annotations

import numpy as np
import pytest

from seqstate.engine import api, kernels, reference, small
from seqstate.errors import ImpossibleSequenceError
from seqstate.io.tables import load_model
from seqstate.model import State, make_model

ALPHABET = "ACGT"
BLOCKS = (1, 2, 7, None)  # None: one block holding the whole record


# ----------------------------------------------------------------- random cases
def _rows(rng, shape, p_zero):
    x = rng.uniform(0.05, 1.0, size=shape)
    if p_zero > 0:
        x = np.where(rng.random(shape) < p_zero, 0.0, x)
        flat = x.reshape(-1, shape[-1])
        for row in flat:
            if not (row > 0).any():
                row[rng.integers(shape[-1])] = rng.uniform(0.05, 1.0)
    return x / x.sum(axis=-1, keepdims=True)


def _narrow_emissions(rng, m, order):
    """Emission tables in which every symbol (in every context) has at most two emitters.

    Needs m <= 8 (4 symbols x 2 emitters); every state emits at least one symbol.
    """
    a = len(ALPHABET)
    e = np.zeros((m, a**order, a))
    for c in range(a**order):
        count = np.zeros(a, dtype=int)
        for s in rng.permutation(m):
            x = rng.choice(np.flatnonzero(count < 2))
            e[s, c, x] = rng.uniform(0.05, 1.0)
            count[x] += 1
        for s in range(m):  # a second symbol now and then, where there is room
            free = np.flatnonzero((count < 2) & (e[s, c] == 0))
            if free.size and rng.random() < 0.5:
                x = rng.choice(free)
                e[s, c, x] = rng.uniform(0.05, 1.0)
                count[x] += 1
    return e / e.sum(axis=-1, keepdims=True)


def _model(seed, m, order, with_end, p_forbid, narrow):
    rng = np.random.default_rng(seed)
    trans = _rows(rng, (m, m), p_forbid)
    if with_end:
        end = rng.uniform(0.01, 0.2, size=m)
        trans = trans * (1.0 - end)[:, None]
    else:
        end = None
    if narrow:
        emissions = _narrow_emissions(rng, m, order)
    else:
        emissions = _rows(rng, (m, len(ALPHABET) ** order, len(ALPHABET)), 0.0)
    states = [State(f"s{i}", "L" if i % 2 == 0 else None) for i in range(m)]
    return make_model(
        name="random",
        alphabet=ALPHABET,
        states=states,
        start=_rows(rng, (m,), 0.0),
        transitions=trans,
        emissions=emissions,
        end=end,
        order=order,
    )


def _record(rng, n, p_unknown=0.1, n_run=True):
    seq = rng.choice(np.frombuffer(b"ACGT", dtype=np.uint8), size=n)
    seq = np.where(rng.random(n) < p_unknown, np.uint8(ord("N")), seq)
    if n_run and n > 20:
        lo = int(rng.integers(0, n - 10))
        seq[lo : lo + 10] = ord("N")
    return seq.tobytes()


def _possible(tables, rng, n, p_unknown=0.1):
    """A record drawn from the model itself (so it is possible), with unknown bases mixed in.

    Path and symbols follow the model's tables; an unknown base (emission factor 1
    in every state) is written with probability ``p_unknown`` and, when the record
    is long enough, as one run of 10.  The emission row of each base uses the same
    context rule as the encoder (longest clean context, at most the order).
    """
    m, a, k = tables.n_states, tables.n_symbols, tables.order
    run_lo = int(rng.integers(0, n - 10)) if n > 20 else -100
    sym = np.empty(n, dtype=np.int64)
    state = int(rng.choice(m, p=tables.start / tables.start.sum()))
    clean = 0
    for i in range(n):
        if i:
            row = tables.transitions[state]
            state = int(rng.choice(m, p=row / row.sum()))
        if rng.random() < p_unknown or run_lo <= i < run_lo + 10:
            sym[i] = -1
            clean = 0
            continue
        j = min(clean, k)
        ctx = 0
        for q in range(i - j, i):
            ctx = ctx * a + int(sym[q])
        probs = tables.E[tables.offsets[j] + ctx * a : tables.offsets[j] + ctx * a + a, state]
        sym[i] = int(rng.choice(a, p=probs / probs.sum()))
        clean += 1
    seq = np.where(sym < 0, ord("N"), np.frombuffer(b"ACGT", np.uint8)[np.maximum(sym, 0)])
    codes = api.encode(tables, seq.astype(np.uint8).tobytes())
    assert _generic_loglik(tables, codes)[1] == -1
    return codes


# ----------------------------------------------------------------- generic calls
def _limit(t):
    """The rescaling threshold the API uses for ``t`` (model-dependent, see kernels)."""
    return kernels.rescale_limit(small.smallest_factor(t))


def _generic_loglik(t, codes):
    return kernels.forward_loglik(
        codes, t.start, t.end, t.E, t.nz_ptr, t.nz_state, t.pred_ptr, t.pred_src, t.pred_p,
        _limit(t),
    )


def _generic_posterior(t, codes, group, n_groups, block):
    n = codes.shape[0]
    nb = (n + block - 1) // block
    m = t.n_states
    out = np.zeros((n, n_groups), dtype=np.float64)
    ack, bck = np.zeros((nb, m)), np.zeros((nb, m))
    alog, blog = np.zeros(nb), np.zeros(nb)
    ll, pos = kernels.posterior_checkpointed(
        codes,
        t.start,
        t.end,
        t.E,
        t.nz_ptr,
        t.nz_state,
        t.pred_ptr,
        t.pred_src,
        t.pred_p,
        t.succ_ptr,
        t.succ_dst,
        t.succ_p,
        block,
        group,
        out,
        ack,
        alog,
        bck,
        blog,
        _limit(t),
    )
    return ll, pos, out, ack, alog, bck, blog


def _generic_viterbi(t, codes, block):
    path = np.empty(codes.shape[0], dtype=np.int16)
    lp, pos = kernels.viterbi_checkpointed(
        codes,
        t.log_start,
        t.log_end,
        t.logE,
        t.nz_ptr,
        t.nz_state,
        t.pred_ptr,
        t.pred_src,
        t.pred_logp,
        block,
        path,
    )
    return path, lp, pos


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
def test_fast_equals_generic_equals_reference(seed, m, k, with_end, p_forbid, narrow, n):
    model = _model(seed, m, k, with_end, p_forbid, narrow)
    t = api.prepare(model)
    sm = small.build(t)
    # the case is about the specialised kernels exactly when every symbol has <= 2 emitters
    assert (sm is not None) == (narrow or m <= 2)
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
        lab = api.posterior(t, codes, group=group, n_groups=1, block=blk)
        assert lab.values.dtype == np.float32
        want = ref_post[:, group == 0].sum(axis=1)
        np.testing.assert_allclose(lab.values[:, 0], want, rtol=0, atol=2e-7)

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
def test_builtin_models_use_the_fast_kernels(name):
    """Both CpG layouts fit the two-emitters kernels, N runs included; results match generic."""
    model = load_model(name)
    t = api.prepare(model)
    sm = small.build(t)
    assert sm is not None
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


def test_viterbi_ties_go_to_the_lowest_state():
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
    assert small.build(t) is not None
    codes = api.encode(t, b"AACAGTNNACGA")
    for block in (1, 2, 7, 12):
        path, lp = api.viterbi(t, codes, block=block)
        gpath, glp, _ = _generic_viterbi(t, codes, block)
        assert np.array_equal(path, gpath) and lp == glp
        assert set(path[np.isin(codes, [0, 1])].tolist()) == {0}
        ref_path, _ = reference.viterbi(t.start, t.transitions, t.end, t.E[codes])
        assert np.array_equal(path, ref_path)


def test_impossible_record_is_reported_with_its_position():
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
    assert small.build(t) is not None
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
