"""Properties every correct HMM engine has, on random models (hypothesis).

The random models and records come from tests/helpers.py, drawn from a seed that
hypothesis chooses (fixed-seed profile, see conftest): small models of 1-5 states
(the generic and small kernel families) and chain-like models of 32-300 states
(the sparse family, the gene-segment shape).
"""

from __future__ import annotations

import os
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from helpers import kernel_family, sample_record
from hypothesis import given, settings
from hypothesis import strategies as st

from seqstate.engine import api, reference
from seqstate.errors import ImpossibleSequenceError
from seqstate.io.tables import load_model
from seqstate.model import State, make_model

model_args = st.fixed_dictionaries(
    {
        "n_states": st.integers(1, 5),
        "order": st.integers(0, 2),
        "with_end": st.booleans(),
        "p_forbid": st.sampled_from([0.0, 0.3]),
        "lower_rows": st.booleans(),
        "max_emitters": st.sampled_from([None, 2]),
    }
)
kernels = st.sampled_from(["specialised", "generic"])
seeds = st.integers(0, 2**32 - 1)
lengths = st.integers(1, 300)


def _possible_record(rng, model, tables, n):
    """A record with unknowns drawn from the model itself, so it has positive probability.

    With an end table and forbidden moves a very short record may be impossible
    whatever its symbols (the start states cannot end yet); the record then grows.
    """
    for attempt in range(40):
        try:
            seq = sample_record(
                rng, n + attempt // 4, p_unknown=0.1, p_lower=0.05, model=model, tables=tables
            )
        except RuntimeError:
            continue
        return seq, api.encode(tables, seq)
    raise AssertionError("no record drawn")


def _draw(random_model, args, seed, n):
    rng = np.random.default_rng(seed)
    model = random_model(rng, **args)
    tables = api.prepare(model)
    seq, codes = _possible_record(rng, model, tables, n)
    return model, tables, seq, codes, len(codes)


@given(model_args, seeds, lengths, kernels)
def test_posteriors_sum_to_one_and_logliks_agree(kernel_switch, random_model, args, seed, n, kind):
    with kernel_switch(kind):
        model, tables, seq, codes, n = _draw(random_model, args, seed, n)
        post = api.posterior(tables, codes, dtype=np.float64)
        # the states partition the outcomes at each base (common practice)
        np.testing.assert_allclose(post.values.sum(axis=1), 1.0, rtol=0, atol=1e-12)
        assert np.all(post.values >= 0.0) and np.all(post.values <= 1.0 + 1e-12)
        ll = api.loglik(tables, codes)
        # forward alone and forward-backward give the same likelihood (common practice)
        assert np.isfinite(ll)
        assert abs(post.loglik - ll) <= 1e-10 * max(1.0, abs(ll))


@given(model_args, seeds, lengths, st.integers(1, 9), kernels)
def test_checkpointed_runs_equal_full_matrix_runs(
    kernel_switch, random_model, args, seed, n, block, kind
):
    with kernel_switch(kind):
        model, tables, seq, codes, n = _draw(random_model, args, seed, n)
        full = api.posterior(tables, codes, block=n, dtype=np.float64)
        small = api.posterior(tables, codes, block=block, dtype=np.float64)
        # checkpointing changes memory, not results (common practice)
        np.testing.assert_allclose(small.values, full.values, rtol=0, atol=1e-10)
        assert abs(small.loglik - full.loglik) <= 1e-10 * max(1.0, abs(full.loglik))
        p_full, lp_full = api.viterbi(tables, codes, block=n)
        p_small, lp_small = api.viterbi(tables, codes, block=block)
        assert p_small.tolist() == p_full.tolist()
        assert abs(lp_small - lp_full) <= 1e-10 * max(1.0, abs(lp_full))


@given(model_args, seeds, lengths, st.integers(1, 9))
def test_specialised_and_generic_kernels_agree(kernel_switch, random_model, args, seed, n, block):
    # two implementations of the same recursions (the specialised kernels' docstring:
    # same scaling conventions, bit-identical Viterbi sums); models drawn with at most
    # two emitters per symbol are the ones the specialised kernels take
    args = {**args, "max_emitters": 2}
    model, tables, seq, codes, n = _draw(random_model, args, seed, n)
    runs = {}
    for kind in ("specialised", "generic"):
        with kernel_switch(kind):
            # the comparison means something only if the small kernels really ran
            assert kernel_family(tables) == ("small" if kind == "specialised" else "generic")
            post = api.posterior(tables, codes, block=block, dtype=np.float64)
            path, logp = api.viterbi(tables, codes, block=block)
            mask = np.arange(model.n_states) % 2 == 0
            seg = api.segment_log_probability(tables, codes, post, n // 3, n, mask)
            runs[kind] = (api.loglik(tables, codes), post, path, logp, seg)
    (l1, p1, v1, lp1, s1), (l2, p2, v2, lp2, s2) = runs["specialised"], runs["generic"]
    assert abs(l1 - l2) <= 1e-12 * max(1.0, abs(l2))
    assert abs(p1.loglik - p2.loglik) <= 1e-12 * max(1.0, abs(l2))
    np.testing.assert_allclose(p1.values, p2.values, rtol=0, atol=1e-12)
    assert v1.tolist() == v2.tolist()
    assert lp1 == lp2
    assert (s1 == s2 == -np.inf) or abs(s1 - s2) <= 1e-10 * max(1.0, abs(s2))


def _path_logp(tables, codes, path):
    """Natural-log joint probability of one path, from the tables (HMM definition)."""
    lattice = tables.E[codes.astype(np.int64)]
    p = path.astype(np.int64)
    with np.errstate(divide="ignore"):
        return float(
            np.log(tables.start[p[0]])
            + np.log(lattice[np.arange(len(p)), p]).sum()
            + np.log(tables.transitions[p[:-1], p[1:]]).sum()
            + np.log(tables.end[p[-1]])
        )


@given(model_args, seeds, lengths, kernels)
def test_viterbi_log_probability_at_most_loglik(kernel_switch, random_model, args, seed, n, kind):
    with kernel_switch(kind):
        model, tables, seq, codes, n = _draw(random_model, args, seed, n)
        path, logp = api.viterbi(tables, codes)
        ll = api.loglik(tables, codes)
        # one path's probability cannot exceed the sum over all paths (common practice)
        assert logp <= ll + 1e-10 * max(1.0, abs(ll))
        # and the reported log probability is the path's own joint probability
        joint = _path_logp(tables, codes, path)
        assert abs(joint - logp) <= 1e-9 * max(1.0, abs(logp))


@given(st.integers(1, 4), st.integers(1, 3), st.booleans(), seeds, lengths, kernels)
def test_order_k_with_equal_contexts_equals_order_zero(
    kernel_switch, random_model, n_states, order, with_end, seed, n, kind
):
    with kernel_switch(kind):
        rng = np.random.default_rng(seed)
        zero = random_model(rng, n_states=n_states, order=0, with_end=with_end, p_forbid=0.3)
        a = len(zero.alphabet)
        tiled = np.repeat(zero.emissions, a**order, axis=1)  # every context row the same
        high = make_model(
            name="tiled",
            alphabet=zero.alphabet,
            states=zero.states,
            start=zero.start,
            transitions=zero.transitions,
            emissions=tiled,
            end=zero.end,
            order=order,
        )
        t0, tk = api.prepare(zero), api.prepare(high)
        seq, c0 = _possible_record(rng, zero, t0, n)
        ck = api.encode(tk, seq)
        # an emission that ignores its context is an order-0 emission (HMM definition)
        l0, lk = api.loglik(t0, c0), api.loglik(tk, ck)
        assert abs(lk - l0) <= 1e-10 * max(1.0, abs(l0))
        p0 = api.posterior(t0, c0, dtype=np.float64)
        pk = api.posterior(tk, ck, dtype=np.float64)
        np.testing.assert_allclose(pk.values, p0.values, rtol=0, atol=1e-10)
        v0, lp0 = api.viterbi(t0, c0)
        vk, lpk = api.viterbi(tk, ck)
        assert abs(lpk - lp0) <= 1e-10 * max(1.0, abs(lp0))
        # the same path, or (where two paths tie exactly, e.g. 0-1-0 against 1-0-0 over two
        # equal symbols) another path of the same probability under the order-0 model
        if vk.tolist() != v0.tolist():
            assert abs(_path_logp(t0, c0, vk) - lp0) <= 1e-10 * max(1.0, abs(lp0))


@given(model_args, seeds, kernels)
def test_long_run_of_unknowns_stays_finite(kernel_switch, random_model, args, seed, kind):
    with kernel_switch(kind):
        rng = np.random.default_rng(seed)
        model = random_model(rng, **args)
        tables = api.prepare(model)
        # a record drawn from the model (so possible), its middle 5 kb masked as N
        drawn = sample_record(rng, 5300, model=model, tables=tables)
        seq = drawn[:150] + "N" * 5000 + drawn[5150:]
        codes = api.encode(tables, seq)
        ll = api.loglik(tables, codes)
        assert np.isfinite(ll)
        post = api.posterior(tables, codes, block=64, dtype=np.float64)
        assert not np.any(np.isnan(post.values))
        np.testing.assert_allclose(post.values.sum(axis=1), 1.0, rtol=0, atol=1e-12)
        path, logp = api.viterbi(tables, codes, block=64)
        assert np.isfinite(logp) and logp <= ll + 1e-9 * abs(ll)


def test_long_run_of_unknowns_matches_reference_forward_backward(
    kernel, random_model, random_sequence
):
    # 5 kb of N inside a record, with an end table (each step inside the run then
    # multiplies by 1 - end, which underflows without rescaling); the reference
    # forward-backward, scaled at every position (common practice), is the oracle
    rng = np.random.default_rng(2024)
    model = random_model(rng, n_states=3, order=1, with_end=True)
    tables = api.prepare(model)
    seq = random_sequence(rng, 200) + "N" * 5000 + random_sequence(rng, 200)
    codes = api.encode(tables, seq)
    lattice = tables.E[codes.astype(np.int64)]
    ll_ref, post_ref = reference.forward_backward(
        tables.start, tables.transitions, tables.end, lattice
    )
    ll = api.loglik(tables, codes)
    assert np.isfinite(ll) and ll < -1000.0  # the run costs log(1 - end) per base
    assert abs(ll - ll_ref) <= 1e-10 * abs(ll_ref)
    post = api.posterior(tables, codes, block=100, dtype=np.float64)
    np.testing.assert_allclose(post.values, post_ref, rtol=0, atol=1e-10)


def test_long_run_of_unknowns_on_cpg_island(kernel, random_sequence):
    model = load_model("cpg-island")
    tables = api.prepare(model)
    rng = np.random.default_rng(3)
    seq = random_sequence(rng, 1000) + "N" * 5000 + random_sequence(rng, 1000)
    codes = api.encode(tables, seq)
    ll = api.loglik(tables, codes)
    assert np.isfinite(ll)
    post = api.posterior(tables, codes, dtype=np.float64)
    assert not np.any(np.isnan(post.values))
    lattice = tables.E[codes.astype(np.int64)]
    ll_ref, post_ref = reference.forward_backward(
        tables.start, tables.transitions, tables.end, lattice
    )
    # forward-backward scaled at every position (common practice) as the oracle
    assert abs(ll - ll_ref) <= 1e-10 * abs(ll_ref)
    np.testing.assert_allclose(post.values, post_ref, rtol=0, atol=1e-10)


# ------------------------------------------------------------------ chain-like models
# Large models made mostly of chains (each state with few successors, the layout of
# the gene-segment model): the only ones the sparse kernels take, which the small
# models above never reach.  Few examples and short records keep the run modest.
chain_args = st.fixed_dictionaries(
    {
        "n_states": st.integers(32, 300),
        "order": st.integers(0, 2),
        "with_end": st.booleans(),
    }
)
chain_lengths = st.integers(1, 120)
chain_settings = settings(max_examples=12)


def _draw_chain(kernel_switch, random_model, args, seed, n):
    """A chain-like model, its tables and a record drawn from it (possible, a few N)."""
    rng = np.random.default_rng(seed)
    model = random_model(rng, layout="chains", **args)
    tables = api.prepare(model)
    seq = sample_record(rng, n, p_unknown=0.05, p_lower=0.05, model=model, tables=tables)
    with kernel_switch("specialised"):
        # the strategy is about the sparse family: every model it draws must reach it
        assert kernel_family(tables) == "sparse", (args, seed)
    return model, tables, api.encode(tables, seq)


@chain_settings
@given(chain_args, seeds, chain_lengths, st.integers(1, 50))
def test_chain_models_posteriors_logliks_and_viterbi(
    kernel_switch, random_model, args, seed, n, block
):
    model, tables, codes = _draw_chain(kernel_switch, random_model, args, seed, n)
    with kernel_switch("specialised"):
        post = api.posterior(tables, codes, block=block, dtype=np.float64)
        # the states partition the outcomes at each base (common practice)
        np.testing.assert_allclose(post.values.sum(axis=1), 1.0, rtol=0, atol=1e-12)
        assert np.all(post.values >= 0.0) and np.all(post.values <= 1.0 + 1e-12)
        ll = api.loglik(tables, codes)
        assert np.isfinite(ll)
        assert abs(post.loglik - ll) <= 1e-10 * max(1.0, abs(ll))
        # the backward recursion gives the same likelihood as the forward one
        # (common practice): P(x) = sum_s start_s e_s(x_0) beta_0(s)
        beta, blog = api.backward_vector(tables, codes, post, 0)
        first = tables.E[int(codes[0])]
        back = float(np.log(np.sum(tables.start * first * beta)) + blog)
        assert abs(back - ll) <= 1e-10 * max(1.0, abs(ll))
        # one path's probability cannot exceed the sum over all paths (common
        # practice), and the reported value is the path's own joint probability
        path, logp = api.viterbi(tables, codes, block=block)
        assert logp <= ll + 1e-10 * max(1.0, abs(ll))
        assert abs(_path_logp(tables, codes, path) - logp) <= 1e-9 * max(1.0, abs(logp))


@chain_settings
@given(chain_args, seeds, chain_lengths, st.integers(1, 50))
def test_chain_models_sparse_equals_generic_and_reference(
    kernel_switch, random_model, args, seed, n, block
):
    model, tables, codes = _draw_chain(kernel_switch, random_model, args, seed, n)
    runs = {}
    for kind in ("specialised", "generic"):
        with kernel_switch(kind):
            assert kernel_family(tables) == ("sparse" if kind == "specialised" else "generic")
            post = api.posterior(tables, codes, block=block, dtype=np.float64)
            path, logp = api.viterbi(tables, codes, block=block)
            runs[kind] = (api.loglik(tables, codes), post, path, logp)
    (l1, p1, v1, lp1), (l2, p2, v2, lp2) = runs["specialised"], runs["generic"]
    # two implementations of the same recursions (sparse.py docstring: same results
    # as the generic kernels, Viterbi with the same tie rule)
    assert abs(l1 - l2) <= 1e-10 * max(1.0, abs(l2))
    np.testing.assert_allclose(p1.values, p2.values, rtol=0, atol=1e-10)
    assert v1.tolist() == v2.tolist()
    assert abs(lp1 - lp2) <= 1e-10 * max(1.0, abs(lp2))
    # the plain-NumPy reference (seqstate.engine.reference, full lattices)
    lattice = tables.E[codes.astype(np.int64)]
    ref_ll, ref_post = reference.forward_backward(
        tables.start, tables.transitions, tables.end, lattice
    )
    ref_path, ref_lp = reference.viterbi(tables.start, tables.transitions, tables.end, lattice)
    assert abs(l1 - ref_ll) <= 1e-10 * max(1.0, abs(ref_ll))
    np.testing.assert_allclose(p1.values, ref_post, rtol=0, atol=1e-10)
    assert v1.tolist() == ref_path.tolist()
    assert abs(lp1 - ref_lp) <= 1e-10 * max(1.0, abs(ref_lp))


# ------------------------------------------------------------------ impossible records
def _only_a():
    return make_model(
        name="only-a",
        alphabet="ACGT",
        states=[State("a")],
        start=[1.0],
        transitions=[[1.0]],
        emissions=[[1.0, 0.0, 0.0, 0.0]],
    )


def _raises_naming(tables, codes, position):
    for run in (
        lambda: api.loglik(tables, codes),
        lambda: api.posterior(tables, codes),
        lambda: api.posterior(tables, codes, block=2),
        lambda: api.viterbi(tables, codes),
        lambda: api.viterbi(tables, codes, block=3),
    ):
        with pytest.raises(ImpossibleSequenceError) as info:
            run()
        numbers = [int(x) for x in re.findall(r"position (\d+)", str(info.value))]
        assert numbers == [position], str(info.value)


@given(st.integers(0, 200), st.integers(0, 60), st.sampled_from("CGT"), kernels)
def test_impossible_record_names_first_impossible_base(kernel_switch, before, after, bad, kind):
    with kernel_switch(kind):
        tables = api.prepare(_only_a())
        seq = "A" * before + bad + "A" * after + bad
        # the first base the model cannot emit, 1-based (the message convention in errors.py)
        _raises_naming(tables, api.encode(tables, seq), before + 1)


def test_impossible_record_with_unknowns_before_the_bad_base(kernel):
    tables = api.prepare(_only_a())
    seq = "AANNNaa" + "NNNN" + "C"
    _raises_naming(tables, api.encode(tables, seq), len(seq))


def test_impossible_by_forbidden_transition(kernel):
    # x emits only A, y only C; y may follow x but x may not follow y
    model = make_model(
        name="one-way",
        alphabet="ACGT",
        states=[State("x"), State("y")],
        start=[1.0, 0.0],
        transitions=[[0.5, 0.5], [0.0, 1.0]],
        emissions=[[1.0, 0, 0, 0], [0, 1.0, 0, 0]],
    )
    tables = api.prepare(model)
    seq = "AAACCCCA" + "C" * 5
    _raises_naming(tables, api.encode(tables, seq), 8)


def test_impossible_end_is_reported(kernel):
    # the only state with an end probability cannot be in use at the last base
    model = make_model(
        name="needs-i",
        alphabet="ACGT",
        states=[State("e"), State("i")],
        start=[1.0, 0.0],
        transitions=[[0.5, 0.5], [0.0, 0.9]],
        end=[0.0, 0.1],
        emissions=[[0.25] * 4, [0.0, 0.0, 0.0, 1.0]],
    )
    tables = api.prepare(model)
    codes = api.encode(tables, "ACGTTTA")  # ends on A, which i cannot emit
    for run in (
        lambda: api.loglik(tables, codes),
        lambda: api.posterior(tables, codes),
        lambda: api.viterbi(tables, codes),
    ):
        with pytest.raises(ImpossibleSequenceError, match="end"):
            run()


# ------------------------------------------------------------------ extreme probabilities
@pytest.mark.parametrize("tiny", [1e-210, 1e-250, 1e-300])
def test_tiny_but_valid_probability_is_neither_lost_nor_infinite(kernel, tiny):
    # state a emits A, G or T (1/3 each) and leaves for b with probability `tiny`;
    # b emits only C and stays.  A record A^n C has exactly one path, a^n b, whose
    # log probability is n log(1/3) + log(tiny) (HMM definition).  Every factor is a
    # normal float64, so an engine that scales its vectors must report this value for
    # every n (common practice: scaling keeps long products representable).
    model = make_model(
        name="tiny-move",
        alphabet="ACGT",
        states=[State("a"), State("b")],
        start=[1.0, 0.0],
        transitions=[[1.0 - tiny, tiny], [0.0, 1.0]],
        emissions=[[1 / 3, 0.0, 1 / 3, 1 / 3], [0.0, 1.0, 0.0, 0.0]],
    )
    tables = api.prepare(model)
    wrong = []
    for n in range(150, 260):
        codes = api.encode(tables, "A" * n + "C")
        want = n * np.log(1 / 3) + np.log(tiny)
        try:
            got = (api.loglik(tables, codes), api.posterior(tables, codes).loglik)
        except ImpossibleSequenceError as exc:
            wrong.append((n, str(exc)))
            continue
        if not all(abs(g - want) <= 1e-9 * abs(want) for g in got):
            wrong.append((n, got))
    assert wrong == []


# ------------------------------------------------------------------ argument checks
_GROUP_SCRIPT = """
import numpy as np
from seqstate.engine import api
from seqstate.io.tables import load_model
t = api.prepare(load_model("cpg-island"))
c = api.encode(t, "ACGT" * 2000)
for group in ([0, 7], [0, -2], [0]):
    try:
        p = api.posterior(t, c, group=np.array(group), n_groups=1, dtype=np.float64)
    except ValueError as exc:
        print("refused", exc)
    else:
        print("accepted", p.values.shape)
"""


def test_group_column_out_of_range_is_refused():
    # a group column >= n_groups has nowhere to go; the compiled kernel does not
    # check bounds, so the API must refuse it (common practice: validate arguments
    # before unchecked native code).  Run apart: a stray write can abort the process.
    proc = subprocess.run(
        [sys.executable, "-c", _GROUP_SCRIPT],
        capture_output=True,
        text=True,
        timeout=120,
        cwd=str(Path(__file__).resolve().parent.parent),
        env={**os.environ, "PYTHONPATH": str(Path(__file__).resolve().parent.parent)},
    )
    # the refusal is the API's own ValueError naming the allowed range (another exception,
    # a crash or an accepted call fails); also a column below -1 and a short group array
    assert proc.returncode == 0, (proc.returncode, proc.stdout, proc.stderr[-500:])
    assert (
        proc.stdout.splitlines() == ["refused group must hold one column in [-1, 1) per state"] * 3
    ), proc.stdout


def test_empty_segment(kernel):
    # [start0, start0) holds no base: the constraint is vacuous, so log P = 0 (the
    # api docstring: "an empty segment: the condition holds for every path"); -inf
    # (impossible) or an exception would be wrong
    model = load_model("cpg-island")
    tables = api.prepare(model)
    codes = api.encode(tables, "ACGTACGTCG" * 5)
    post = api.posterior(tables, codes, dtype=np.float64)
    for mask in (np.array([True, False]), np.array([False, True])):
        for s0 in (0, 5, 50):
            got = api.segment_log_probability(tables, codes, post, s0, s0, mask)
            assert got == 0.0, (s0, got)
