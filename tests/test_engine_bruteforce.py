"""The compiled kernels against exhaustive enumeration of every state path.

The oracle is the definition of a hidden Markov model: the joint probability of
a path is start * emissions * transitions * end, and likelihoods, posteriors,
the best path and segment probabilities are sums and maxima over all paths
(common practice).  ``seqstate.engine.reference.brute_force`` does that enumeration, and
this file adds its own vectorised enumeration for segment queries.  Random
real-valued parameters make exact ties between paths practically impossible, so
the best path is unique for the fixed seeds used here.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest

from seqstate.engine import api, reference, small

# (n_states, length, order, with_end, seed, max_emitters): small enough to enumerate
# every path.  max_emitters = 2 draws models in which each symbol is emitted by at
# most two states, the layout the engine's specialised kernels take over (every
# one- and two-state model has it too); None draws unrestricted emissions.
CASES = [
    (1, 6, 0, False, 11, None),
    (1, 5, 2, True, 12, None),
    (2, 8, 0, False, 13, None),
    (2, 8, 1, True, 14, None),
    (2, 7, 2, False, 15, None),
    (3, 8, 0, True, 16, None),
    (3, 7, 1, False, 17, None),
    (3, 6, 2, True, 18, None),
    (4, 6, 0, False, 19, None),
    (4, 7, 1, True, 20, None),
    (4, 6, 2, False, 21, None),
    (4, 5, 1, True, 22, None),
    (3, 8, 0, False, 23, 2),
    (3, 7, 1, True, 24, 2),
    (4, 7, 0, True, 25, 2),
    (4, 6, 1, False, 26, 2),
    (4, 6, 2, True, 27, 2),
]
IDS = [
    f"M{m}-N{n}-k{k}-{'end' if e else 'noend'}-seed{s}{'-narrow' if x else ''}"
    for m, n, k, e, s, x in CASES
]

TOL = 1e-12


def _setup(random_model, random_sequence, m, n, k, with_end, seed, max_emitters=None):
    """A random model with forbidden moves and a record it can emit (with unknowns)."""
    rng = np.random.default_rng(seed)
    model = random_model(
        rng,
        n_states=m,
        order=k,
        with_end=with_end,
        p_forbid=0.3,
        p_zero_emission=0.15,
        lower_rows=(seed % 2 == 0),
        max_emitters=max_emitters,
    )
    tables = api.prepare(model)
    for _ in range(200):
        seq = random_sequence(rng, n, p_unknown=0.15, p_lower=0.1)
        codes = api.encode(tables, seq)
        lattice = tables.E[codes.astype(np.int64)]
        # cheap unscaled forward sum first: enumerate only records of positive probability
        alpha = tables.start * lattice[0]
        for i in range(1, n):
            alpha = (alpha @ tables.transitions) * lattice[i]
        if float(alpha @ tables.end) <= 0.0:
            continue
        with np.errstate(divide="ignore", invalid="ignore"):
            bf = reference.brute_force(tables.start, tables.transitions, tables.end, lattice)
        if bf["total"] > 0:
            return model, tables, seq, codes, lattice, bf
    raise AssertionError("no possible record drawn")


@pytest.fixture(params=CASES, ids=IDS, scope="module")
def case(request, random_model, random_sequence):
    return _setup(random_model, random_sequence, *request.param)


def test_narrow_cases_fit_the_specialised_kernels(case, request):
    # guards the coverage claim of CASES: the narrow cases (and every model of at
    # most two states) are ones the specialised kernels accept, the others are not
    m, _, k, _, _, max_emitters = request.node.callspec.params["case"]
    model, tables, seq, codes, lattice, bf = case
    full = tables.E[int(tables.offsets[k]) : int(tables.offsets[k + 1])]
    emitters = (full > 0).sum(axis=1)  # states emitting each code of the full order
    assert (emitters.max() <= 2) == (max_emitters == 2 or m <= 2)
    assert (small.build(tables) is not None) == (max_emitters == 2 or m <= 2)


def test_loglik_matches_enumeration(kernel, case):
    model, tables, seq, codes, lattice, bf = case
    # the likelihood is the sum of the joint probabilities of all paths (HMM definition)
    assert abs(api.loglik(tables, codes) - bf["loglik"]) <= TOL * max(1.0, abs(bf["loglik"]))


@pytest.mark.parametrize("which", ["block1", "block2", "block3", "blockN"])
def test_state_posteriors_match_enumeration(kernel, case, which):
    model, tables, seq, codes, lattice, bf = case
    n = len(codes)
    block = {"block1": 1, "block2": 2, "block3": 3, "blockN": n}[which]
    post = api.posterior(tables, codes, block=block, dtype=np.float64)
    # P(z_i = s | x) = sum over paths through s at i / sum over all paths (HMM definition)
    assert post.values.shape == (n, model.n_states)
    np.testing.assert_allclose(post.values, bf["posterior"], rtol=0, atol=TOL)
    assert abs(post.loglik - bf["loglik"]) <= TOL * max(1.0, abs(bf["loglik"]))


@pytest.mark.parametrize("block", [1, 2, 3, None])
def test_label_group_posteriors_match_enumeration(kernel, case, block):
    model, tables, seq, codes, lattice, bf = case
    n = len(codes)
    group = model.label_index()
    n_groups = len(model.labels)
    post = api.posterior(
        tables,
        codes,
        group=group,
        n_groups=n_groups,
        block=n if block is None else block,
        dtype=np.float64,
    )
    expected = np.zeros((n, n_groups))
    for s, g in enumerate(group):
        if g >= 0:
            expected[:, g] += bf["posterior"][:, s]
    # a label's posterior is the sum of the posteriors of its states (HMM definition)
    assert post.values.shape == (n, n_groups)
    np.testing.assert_allclose(post.values, expected, rtol=0, atol=TOL)


def test_custom_groups_match_enumeration(kernel, case):
    model, tables, seq, codes, lattice, bf = case
    m, n = model.n_states, len(codes)
    # every state in its own column, in reverse order, plus one state dropped (-1)
    group = np.arange(m)[::-1].copy()
    group[0] = -1
    post = api.posterior(tables, codes, group=group, n_groups=m, block=2, dtype=np.float64)
    expected = np.zeros((n, m))
    for s, g in enumerate(group):
        if g >= 0:
            expected[:, g] += bf["posterior"][:, s]
    np.testing.assert_allclose(post.values, expected, rtol=0, atol=TOL)


@pytest.mark.parametrize("which", ["block1", "block2", "block3", "blockN", "default"])
def test_viterbi_matches_enumeration(kernel, case, which):
    model, tables, seq, codes, lattice, bf = case
    n = len(codes)
    block = {"block1": 1, "block2": 2, "block3": 3, "blockN": n, "default": None}[which]
    path, logp = api.viterbi(tables, codes, block=block)
    # the Viterbi path is the single most probable path (HMM definition)
    assert path.tolist() == bf["best_path"].tolist()
    assert abs(logp - bf["best_logp"]) <= TOL * max(1.0, abs(bf["best_logp"]))


def test_reference_forward_backward_and_viterbi_agree_with_enumeration(case):
    # the project's scaled forward-backward reference (per-position scaling, common
    # practice) is itself checked here so that the larger tests that lean on it stand on enumeration
    model, tables, seq, codes, lattice, bf = case
    ll, post = reference.forward_backward(tables.start, tables.transitions, tables.end, lattice)
    assert abs(ll - bf["loglik"]) <= TOL * max(1.0, abs(bf["loglik"]))
    np.testing.assert_allclose(post, bf["posterior"], rtol=0, atol=TOL)
    path, logp = reference.viterbi(tables.start, tables.transitions, tables.end, lattice)
    assert path.tolist() == bf["best_path"].tolist()
    assert abs(logp - bf["best_logp"]) <= TOL * max(1.0, abs(bf["best_logp"]))


# ------------------------------------------------------------------ segments
def _path_arrays(bf):
    paths = np.array(list(bf["paths"].keys()), dtype=np.int64)
    probs = np.array(list(bf["paths"].values()))
    return paths, probs


def _all_masks(m):
    for bits in itertools.product([False, True], repeat=m):
        yield np.array(bits, dtype=bool)


def _segment_truth(bf, m, n):
    """{(mask bits, s0, e0): P(z_i in mask for all i in [s0, e0) | x)} by enumeration.

    The sum over the paths that stay inside the mask on the segment, divided by
    the sum over all paths (HMM definition).
    """
    paths, probs = _path_arrays(bf)
    total = probs.sum()
    out = {}
    for mask in _all_masks(m):
        inside = mask[paths]  # (paths, N): is the path's state at i in the mask
        for s0 in range(n):
            stay = np.cumprod(inside[:, s0:], axis=1)  # column L: inside on s0..s0+L
            sums = probs @ stay
            for e0 in range(s0 + 1, n + 1):
                out[tuple(mask.tolist()), s0, e0] = sums[e0 - s0 - 1] / total
    return out


@pytest.mark.parametrize("block", [3, None])
def test_segment_log_probability_matches_enumeration(kernel, case, block):
    model, tables, seq, codes, lattice, bf = case
    m, n = model.n_states, len(codes)
    post = api.posterior(tables, codes, block=n if block is None else block, dtype=np.float64)
    truth = _segment_truth(bf, m, n)
    for (bits, s0, e0), want in truth.items():
        mask = np.array(bits, dtype=bool)
        got = api.segment_log_probability(tables, codes, post, s0, e0, mask)
        where = f"mask {list(bits)} segment [{s0}, {e0})"
        if want == 0.0:
            assert got == -np.inf, where
            continue
        assert np.isfinite(got) and got <= 0.0, where
        assert abs(np.exp(got) - want) <= TOL, where
        if want > 1e-6:
            assert abs(got - np.log(want)) <= 1e-9, where


def test_segment_of_one_base_is_its_posterior(kernel, case):
    model, tables, seq, codes, lattice, bf = case
    m, n = model.n_states, len(codes)
    post = api.posterior(tables, codes, block=2, dtype=np.float64)
    for mask in _all_masks(m):
        if not mask.any():
            continue
        for i in range(n):
            p = float(bf["posterior"][i, mask].sum())
            got = api.segment_log_probability(tables, codes, post, i, i + 1, mask)
            # one base: P(z_i in mask | x) is the summed posterior (HMM definition)
            if p == 0.0:
                assert got == -np.inf
            else:
                assert abs(np.exp(got) - p) <= TOL, (mask.tolist(), i)


def test_segment_probability_at_most_min_base_posterior(kernel, case):
    model, tables, seq, codes, lattice, bf = case
    m, n = model.n_states, len(codes)
    post = api.posterior(tables, codes, block=3, dtype=np.float64)
    for mask in _all_masks(m):
        if not mask.any():
            continue
        per_base = bf["posterior"][:, mask].sum(axis=1)
        for s0 in range(n):
            for e0 in range(s0 + 1, n + 1):
                got = api.segment_log_probability(tables, codes, post, s0, e0, mask)
                # the event "all bases in the mask" implies each base is: probability
                # can only shrink (common practice: monotonicity of probability)
                assert np.exp(got) <= per_base[s0:e0].min() + TOL


def test_whole_record_segment_is_probability_path_stays_in_mask(kernel, case):
    model, tables, seq, codes, lattice, bf = case
    m, n = model.n_states, len(codes)
    post = api.posterior(tables, codes, dtype=np.float64)
    for mask in _all_masks(m):
        # paths that never leave the mask, enumerated directly from the model's tables
        keep = 0.0
        for path in itertools.product(np.flatnonzero(mask).tolist(), repeat=n):
            p = tables.start[path[0]] * lattice[0, path[0]]
            for i in range(1, n):
                p *= tables.transitions[path[i - 1], path[i]] * lattice[i, path[i]]
            keep += p * tables.end[path[-1]]
        want = keep / bf["total"]
        got = api.segment_log_probability(tables, codes, post, 0, n, mask)
        if want == 0.0:
            assert got == -np.inf
        else:
            assert abs(np.exp(got) - want) <= TOL


def _prefix_paths(tables, lattice, length):
    """Every path of ``length`` states: (paths, transition products, emission prefix products).

    ``cum[:, i]`` is the product of the emission factors of positions 0..i-1
    along the path; no end factor (the record goes on after ``length``).
    """
    m = tables.n_states
    paths = np.array(list(itertools.product(range(m), repeat=length)), dtype=np.int64)
    tp = tables.start[paths[:, 0]].copy()
    for i in range(1, length):
        tp *= tables.transitions[paths[:, i - 1], paths[:, i]]
    cum = np.ones((paths.shape[0], length + 1))
    for i in range(length):
        cum[:, i + 1] = cum[:, i] * lattice[i, paths[:, i]]
    return paths, tp, cum


def test_segment_log_odds_matches_enumeration(kernel, case):
    model, tables, seq, codes, lattice, bf = case
    m, n = model.n_states, len(codes)
    post = api.posterior(tables, codes, block=2, dtype=np.float64)
    checked = 0
    for e0 in range(1, n + 1):
        paths, tp, cum = _prefix_paths(tables, lattice, e0)
        for s0 in range(e0):
            w_emit = tp * cum[:, e0]  # P(x_0..x_{e0-1}, path)
            w_prior = tp * cum[:, s0]  # P(x_0..x_{s0-1}, path): no emissions on the segment
            for mask in _all_masks(m):
                terms = []
                for msk in (mask, ~mask):
                    ind = msk[paths[:, s0:e0]].all(axis=1)
                    terms.append((w_emit[ind].sum(), w_prior[ind].sum()))
                got = api.segment_log_odds(tables, codes, post, s0, e0, mask)
                (n_in, d_in), (n_out, d_out) = terms
                where = f"mask {mask.tolist()} segment [{s0}, {e0})"
                # log P(x_seg | x_before, z_seg in mask) - log P(x_seg | x_before, z_seg
                # outside mask), each a ratio of path sums (definition in the api
                # docstring); NaN when a class cannot hold the segment at all
                if d_in == 0 or d_out == 0 or (n_in == 0 and n_out == 0):
                    assert np.isnan(got), where
                elif n_in == 0:
                    assert got == -np.inf, where
                elif n_out == 0:
                    assert got == np.inf, where
                else:
                    want = np.log(n_in / d_in) - np.log(n_out / d_out)
                    assert abs(got - want) <= 1e-10 * max(1.0, abs(want)), where
                    checked += 1
    # a one-state model has no non-trivial mask; every other case compares numbers
    assert checked > 0 or m == 1


# ------------------------------------------------------------------ emission lattice
def _stationary(cond: np.ndarray, a: int, k: int) -> np.ndarray:
    """Stationary k-mer law of an order-k chain by eigen-decomposition (common practice)."""
    size = a**k
    P = np.zeros((size, size))
    for u in range(size):
        for x in range(a):
            v = (u * a + x) % size
            P[u, v] += cond[u, x]
    w, vecs = np.linalg.eig(P.T)
    i = int(np.argmin(np.abs(w - 1.0)))
    pi = np.real(vecs[:, i])
    return pi / pi.sum()


def _expected_lattice(model, seq: str) -> np.ndarray:
    """Emission factor per position and state from the model's tables and the back-off rule.

    Rule (seqstate.engine.api module docstring): the context is the longest run of
    known symbols (at most k) before the base; an unknown base has factor 1; a
    shorter context uses the explicit lower-order row when given, else the order-k
    rows averaged with the state's own stationary k-mer weights.
    """
    a, k, m = len(model.alphabet), model.order, model.n_states
    sym = [model.alphabet.find(ch.upper()) for ch in seq]
    out = np.ones((len(seq), m))
    for i, x in enumerate(sym):
        if x < 0:
            continue
        j = 0
        while j < k and i - j - 1 >= 0 and sym[i - j - 1] >= 0:
            j += 1
        ctx = sym[i - j : i]
        for s in range(m):
            c = 0
            for y in ctx:
                c = c * a + y
            if j == k:
                out[i, s] = model.emissions[s, c, x]
                continue
            given = model.lower_emissions.get(j)
            if given is not None and not np.all(np.isnan(given[s, c])):
                out[i, s] = given[s, c, x]
                continue
            pi = _stationary(model.emissions[s], a, k)
            num = den = 0.0
            for u in range(a**k):
                if u % a**j == c:
                    num += pi[u] * model.emissions[s, u, x]
                    den += pi[u]
            out[i, s] = num / den
    return out


@pytest.mark.parametrize("order", [1, 2, 3])
@pytest.mark.parametrize("lower", [False, True])
def test_emission_lattice_follows_backoff_rule(random_model, random_sequence, order, lower):
    rng = np.random.default_rng(100 + order + 10 * lower)
    model = random_model(rng, n_states=3, order=order, lower_rows=lower)
    tables = api.prepare(model)
    seq = random_sequence(rng, 300, p_unknown=0.1, p_lower=0.1)
    got = tables.E[api.encode(tables, seq).astype(np.int64)]
    np.testing.assert_allclose(got, _expected_lattice(model, seq), rtol=0, atol=1e-12)


# ------------------------------------------------------------------ encoding
@pytest.mark.parametrize("order", [0, 1, 2, 3])
@pytest.mark.parametrize("alphabet", ["ACGT", "123456"])
def test_encode_kernel_matches_reference(random_model, random_sequence, order, alphabet):
    rng = np.random.default_rng(7 + order)
    model = random_model(rng, n_states=2, order=order, alphabet=alphabet)
    tables = api.prepare(model)
    a = len(alphabet)
    for trial in range(20):
        n = int(rng.integers(1, 60))
        seq = random_sequence(rng, n, alphabet, p_unknown=0.05 + 0.02 * trial, p_lower=0.1)
        codes = api.encode(tables, seq)
        sym = api.symbols_of(tables, seq)
        want = reference.encode_codes(sym, order, a, tables.offsets, tables.unknown_code)
        assert codes.tolist() == want.tolist(), seq
        # and directly from the documented layout: offsets[j] + context * A + symbol
        for i, ch in enumerate(seq):
            x = alphabet.find(ch.upper())
            if x < 0:
                assert codes[i] == tables.unknown_code
                continue
            j = 0
            while j < order and i - j - 1 >= 0 and alphabet.find(seq[i - j - 1].upper()) >= 0:
                j += 1
            ctx = 0
            for q in range(i - j, i):
                ctx = ctx * a + alphabet.find(seq[q].upper())
            assert codes[i] == tables.offsets[j] + ctx * a + x, (seq, i)


def test_unknown_symbol_has_factor_one_in_every_state(random_model):
    rng = np.random.default_rng(5)
    model = random_model(rng, n_states=4, order=2, p_zero_emission=0.3)
    tables = api.prepare(model)
    codes = api.encode(tables, "NRYn-.")
    assert set(codes.tolist()) == {tables.unknown_code}
    # an unknown base is marginalised: sum over the alphabet of P(x) = 1 (HMM definition)
    assert tables.E[tables.unknown_code].tolist() == [1.0] * 4
