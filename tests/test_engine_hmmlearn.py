"""The engine against a general-purpose reference library: hmmlearn 0.3.3.

``hmmlearn.hmm.CategoricalHMM`` with the same start, transition and emission
tables (parameters frozen: ``init_params=""``, ``params=""``) gives the
log-likelihood (``score``), the posteriors (``predict_proba``) and the Viterbi
path (``decode(algorithm="viterbi")``).  hmmlearn has no end probabilities, so
these models have no end table.  Records are sampled from the models
themselves, 10,000 symbols long.
"""

from __future__ import annotations

import numpy as np
import pytest
from hmmlearn import hmm

from seqstate.engine import api, small
from seqstate.model import State, make_model

N = 10_000


def _sample(rng, start, trans, emis, n):
    """States and symbols of one record drawn from the chain (common practice)."""
    m, a = emis.shape
    z = np.empty(n, dtype=np.int64)
    x = np.empty(n, dtype=np.int64)
    z[0] = rng.choice(m, p=start)
    for i in range(1, n):
        z[i] = rng.choice(m, p=trans[z[i - 1]])
    u = rng.random(n)
    cdf = np.cumsum(emis, axis=1)
    for i in range(n):
        x[i] = min(int(np.searchsorted(cdf[z[i]], u[i], side="right")), a - 1)
    return z, x


def _pair(m, alphabet, seed, narrow=False):
    rng = np.random.default_rng(seed)
    a = len(alphabet)
    start = rng.dirichlet(np.ones(m))
    # sticky chains with real-valued entries: long runs, no ties between paths
    trans = rng.dirichlet(np.ones(m), size=m) * 0.2 + np.eye(m) * 0.8
    emis = rng.dirichlet(np.full(a, 0.7), size=m)
    emis = emis + 1e-3
    if narrow:
        # each symbol emitted by at most two states (each state by at least one symbol):
        # the layout the engine's specialised kernels take
        allowed = np.zeros((m, a), dtype=bool)
        allowed[np.arange(m), np.arange(m) % a] = True
        for x in range(a):
            free = np.flatnonzero(~allowed[:, x])
            if allowed[:, x].sum() < 2 and free.size:
                allowed[rng.choice(free), x] = True
        emis = emis * allowed
    emis = emis / emis.sum(axis=1, keepdims=True)
    model = make_model(
        name=f"hmmlearn-{m}-{a}",
        alphabet=alphabet,
        states=[State(f"s{i}") for i in range(m)],
        start=start,
        transitions=trans,
        emissions=emis,
    )
    ref = hmm.CategoricalHMM(n_components=m, init_params="", params="")
    ref.startprob_ = start
    ref.transmat_ = trans
    ref.emissionprob_ = emis
    _, x = _sample(rng, start, trans, emis, N)
    seq = "".join(alphabet[i] for i in x)
    return model, ref, seq, x.reshape(-1, 1)


CASES = [(m, alpha, False) for alpha in ("ACGT", "123456") for m in (2, 3, 4, 5)]
CASES += [(3, "ACGT", True), (5, "ACGT", True), (4, "123456", True), (5, "123456", True)]


@pytest.fixture(
    params=CASES,
    ids=[f"M{m}-A{len(a)}{'-narrow' if x else ''}" for m, a, x in CASES],
    scope="module",
)
def pair(request):
    m, alphabet, narrow = request.param
    model, ref, seq, X = _pair(m, alphabet, seed=1000 + 10 * m + len(alphabet), narrow=narrow)
    # the narrow cases (and every two-state model) must reach the specialised kernels
    assert (small.build(api.prepare(model)) is not None) == (narrow or m <= 2)
    return model, ref, seq, X


def test_loglik_matches_hmmlearn(kernel, pair):
    model, ref, seq, X = pair
    tables = api.prepare(model)
    codes = api.encode(tables, seq)
    want = ref.score(X)  # hmmlearn 0.3.3: natural-log likelihood of the sequence
    assert abs(api.loglik(tables, codes) - want) <= 1e-8 * abs(want)
    post = api.posterior(tables, codes, dtype=np.float64)
    assert abs(post.loglik - want) <= 1e-8 * abs(want)


@pytest.mark.parametrize("block", [None, 7, N])
def test_posteriors_match_hmmlearn(kernel, pair, block):
    model, ref, seq, X = pair
    tables = api.prepare(model)
    codes = api.encode(tables, seq)
    post = api.posterior(tables, codes, block=block, dtype=np.float64)
    want = ref.predict_proba(X)  # hmmlearn 0.3.3: forward-backward state posteriors
    assert post.values.shape == want.shape
    np.testing.assert_allclose(post.values, want, rtol=0, atol=1e-8)


@pytest.mark.parametrize("block", [None, 7, N])
def test_viterbi_matches_hmmlearn(kernel, pair, block):
    model, ref, seq, X = pair
    tables = api.prepare(model)
    codes = api.encode(tables, seq)
    path, logp = api.viterbi(tables, codes, block=block)
    want_logp, want_path = ref.decode(X, algorithm="viterbi")  # hmmlearn 0.3.3
    assert np.array_equal(path.astype(np.int64), want_path)
    assert abs(logp - want_logp) <= 1e-8 * abs(want_logp)
