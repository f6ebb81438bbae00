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
from helpers import kernel_family, random_model, sample_record
from hmmlearn import hmm

from seqstate.engine import api, small

N = 10_000


def _pair(m, alphabet, seed, narrow=False):
    """A random model (tests/helpers.py), the same tables in hmmlearn, and a record drawn
    from the model (common practice: a draw from the chain)."""
    rng = np.random.default_rng(seed)
    # each symbol emitted by at most two states when narrow: the small kernels' layout;
    # sticky chains with real-valued entries: long runs, no near-ties between paths
    model = random_model(
        rng,
        n_states=m,
        sticky=0.8,
        alphabet=alphabet,
        max_emitters=2 if narrow else None,
        name="hmmlearn-narrow" if narrow else "hmmlearn",
    )
    ref = hmm.CategoricalHMM(n_components=m, init_params="", params="")
    ref.startprob_ = model.start
    ref.transmat_ = model.transitions
    ref.emissionprob_ = model.emissions[:, 0, :]
    seq = sample_record(rng, N, model=model)
    x = np.array([alphabet.index(ch) for ch in seq], dtype=np.int64)
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


def _check_family(kernel, model, tables):
    """The kernels compared are the ones meant: small for narrow and two-state models
    under the specialised switch, generic otherwise."""
    fits = model.n_states <= 2 or "narrow" in model.name
    want = "small" if kernel == "specialised" and fits else "generic"
    assert kernel_family(tables) == want


def test_loglik_matches_hmmlearn(kernel, pair):
    model, ref, seq, X = pair
    tables = api.prepare(model)
    _check_family(kernel, model, tables)
    codes = api.encode(tables, seq)
    want = ref.score(X)  # hmmlearn 0.3.3: natural-log likelihood of the sequence
    assert abs(api.loglik(tables, codes) - want) <= 1e-8 * abs(want)
    post = api.posterior(tables, codes, dtype=np.float64)
    assert abs(post.loglik - want) <= 1e-8 * abs(want)


@pytest.mark.parametrize("block", [None, 7, N])
def test_posteriors_match_hmmlearn(kernel, pair, block):
    model, ref, seq, X = pair
    tables = api.prepare(model)
    _check_family(kernel, model, tables)
    codes = api.encode(tables, seq)
    post = api.posterior(tables, codes, block=block, dtype=np.float64)
    want = ref.predict_proba(X)  # hmmlearn 0.3.3: forward-backward state posteriors
    assert post.values.shape == want.shape
    np.testing.assert_allclose(post.values, want, rtol=0, atol=1e-8)


@pytest.mark.parametrize("block", [None, 7, N])
def test_viterbi_matches_hmmlearn(kernel, pair, block):
    model, ref, seq, X = pair
    tables = api.prepare(model)
    _check_family(kernel, model, tables)
    codes = api.encode(tables, seq)
    path, logp = api.viterbi(tables, codes, block=block)
    want_logp, want_path = ref.decode(X, algorithm="viterbi")  # hmmlearn 0.3.3
    assert np.array_equal(path.astype(np.int64), want_path)
    assert abs(logp - want_logp) <= 1e-8 * abs(want_logp)
