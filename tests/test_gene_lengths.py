"""Length chains: fitted branch mixtures, and the lengths a fitted chain really produces."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from seqstate.commands.fit import chain_runs, set_length_chains
from seqstate.engine import api
from seqstate.engine.sampling import sample_record
from seqstate.kinds import gene_labels, gene_layout
from seqstate.model import State, make_model
from seqstate.model.lengths import branch_logpmf, chain_pmf, fit_branches


def _chain_model(stages: list[int]):
    """background g -> entry e -> branches of chained states -> exit x -> g (alphabet AC)."""
    names = ["g", "e"]
    branches = []
    for b, r in enumerate(stages):
        branch = [f"b{b + 1}_{i + 1}" for i in range(r)]
        branches.append(branch)
        names += branch
    names.append("x")
    idx = {n: i for i, n in enumerate(names)}
    m = len(names)
    t = np.zeros((m, m))
    t[idx["g"], idx["g"]] = 0.5
    t[idx["g"], idx["e"]] = 0.5
    for branch in branches:
        t[idx["e"], idx[branch[0]]] = 1.0 / len(branches)
        chain = [idx[n] for n in branch] + [idx["x"]]
        for a, b in zip(chain, chain[1:]):
            t[a, a] = 0.5
            t[a, b] = 0.5
    t[idx["x"], idx["g"]] = 1.0
    model = make_model(
        name="chain",
        alphabet="AC",
        states=[State(n, None, None) for n in names],
        start=np.eye(m)[0],
        transitions=t,
        emissions=np.full((m, 2), 0.5),
        order=0,
        extra={"fit": {"length_chains": {"e": {"group": "g1", "branches": branches, "exit": "x"}}}},
    )
    return model, idx


def test_branch_pmf_is_the_negative_binomial():
    # P(L) = C(L-1, R-1) (1-p)^R p^(L-R): scipy.stats.nbinom counts the L - R stays
    # before the R-th move on (reference library: SciPy)
    L = np.arange(0, 60)
    got = np.exp(branch_logpmf(L, 4, 0.8))
    want = np.where(L >= 4, stats.nbinom.pmf(L - 4, 4, 0.2), 0.0)
    np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-300)
    assert chain_pmf([4], [1.0], [0.8], 4000).sum() == pytest.approx(1.0, abs=1e-12)


def test_fit_recovers_a_two_branch_mixture():
    # lengths drawn from a known mixture (our own parameters); ML with 20,000 draws
    rng = np.random.default_rng(7)
    n = 20000
    short = 5 + rng.negative_binomial(5, 1 - 0.85, size=n)  # 5 stages, stay 0.85
    long_ = 1 + rng.negative_binomial(1, 1 - 0.995, size=n)  # 1 stage, stay 0.995
    pick = rng.random(n) < 0.4
    lengths = np.where(pick, short, long_)
    fitted = fit_branches(lengths, [5, 1])
    assert fitted.weights[0] == pytest.approx(0.4, abs=0.02)
    assert fitted.stays[0] == pytest.approx(0.85, abs=0.01)
    assert fitted.stays[1] == pytest.approx(0.995, abs=0.001)
    with pytest.raises(ValueError, match="below the fewest stages"):
        fit_branches([3, 10], [5, 4])


def test_sampled_chain_lengths_follow_the_fitted_distribution():
    # Fit a chain to observed lengths, sample a long record from the fitted model
    # (seqstate.engine.sampling) and compare the lengths of the runs through the chain
    # with the fitted distribution: chi-square goodness of fit (SciPy), bins holding at
    # least 5 expected runs (common practice)
    rng = np.random.default_rng(11)
    observed = np.concatenate(
        [4 + rng.negative_binomial(4, 0.3, size=300), 1 + rng.geometric(0.02, size=200) - 1]
    )
    model, idx = _chain_model([4, 1])
    fitted_model, report = set_length_chains(model, {"g1": observed.tolist()})
    assert report["g1"]["runs"] == len(observed)
    f = fit_branches(observed, [4, 1])
    # the moves are the fitted ones
    assert fitted_model.transitions[idx["e"], idx["b1_1"]] == pytest.approx(f.weights[0])
    assert fitted_model.transitions[idx["b1_2"], idx["b1_2"]] == pytest.approx(f.stays[0])
    assert fitted_model.transitions[idx["b2_1"], idx["x"]] == pytest.approx(1 - f.stays[1])
    tables = api.prepare(fitted_model)
    path, _ = sample_record(tables, 600_000, np.random.default_rng(3))
    runs = np.array(chain_runs(fitted_model, path)["g1"])
    assert len(runs) > 2000
    n_max = int(runs.max())
    pmf = chain_pmf(f.stages, f.weights, f.stays, n_max + 1)
    expected = pmf[: n_max + 1] * len(runs)
    expected[n_max] += (1.0 - pmf[: n_max + 1].sum()) * len(runs)  # the tail into the last bin
    counts = np.bincount(runs, minlength=n_max + 1).astype(float)
    # merge neighbouring lengths until every bin expects at least 5 runs
    obs_b, exp_b, o, e = [], [], 0.0, 0.0
    for k in range(n_max + 1):
        o += counts[k]
        e += expected[k]
        if e >= 5:
            obs_b.append(o)
            exp_b.append(e)
            o = e = 0.0
    obs_b[-1] += o
    exp_b[-1] += e
    exp_arr = np.array(exp_b) * (sum(obs_b) / sum(exp_b))
    stat, p = stats.chisquare(obs_b, exp_arr)
    assert p > 0.001, (stat, p, len(obs_b))


def test_gene_layout_chains_label_and_stay_sparse():
    shape = gene_layout.GeneShape(body_stages=(3, 1))
    layout = gene_layout.build_layout(3, shape=shape)
    assert gene_layout.shape_of(list(layout.state_names)).body_stages == (3, 1)
    assert shape.min_intron == 2 + 4 + 1 + 10 + 2
    # the engine serves the bigger layout with its chain-sparse kernels
    assert api.prepare(layout).kernels == "sparse"
    # a body of 7 bases takes the 3-stage branch, split 3 + 2 + 2; 2 bases the 1-stage one
    assert (
        gene_labels.body_labels(7, shape, "i0")
        == ["i0_body1_1"] * 3 + ["i0_body1_2"] * 2 + ["i0_body1_3"] * 2
    )
    assert gene_labels.body_labels(2, shape, "i0") == ["i0_body2_1"] * 2
    chains = layout.extra["fit"]["length_chains"]
    assert set(chains) == {f"{c}_d6+" for c in gene_layout.INTRON_COPIES} | {
        f"{c}_a1-" for c in gene_layout.INTRON_COPIES
    }
    # the minus chain is the mirror: a1- -> last stage ... first stage -> d6-
    minus = chains["i0_a1-"]
    assert minus["branches"][0] == ["i0_body1_3-", "i0_body1_2-", "i0_body1_1-"]
    assert minus["exit"] == "i0_d6-"
    t = layout.transitions
    n = {s: i for i, s in enumerate(layout.state_names)}
    assert t[n["i0_a1-"], n["i0_body1_3-"]] > 0 and t[n["i0_body1_1-"], n["i0_d6-"]] > 0


def test_length_chain_naming_an_unknown_state_is_a_model_error():
    from seqstate.errors import ModelFormatError

    model, _ = _chain_model([2])
    model.extra["fit"]["length_chains"]["e"]["branches"] = [["b1_1", "nope"]]
    with pytest.raises(ModelFormatError, match="length_chains names unknown state 'nope'"):
        chain_runs(model, np.zeros(5, dtype=np.int32))


def test_interpolated_rows_by_hand():
    # order 2, alphabet of 2: P0 = (n0 + pc) / (N + 2 pc); P1(x|s) = (n1 + K P0) / (n1(s) + K);
    # P2(x|rs) = (n2 + K P1(x|s)) / (n2(rs) + K) (interpolation by counts, written out here)
    from seqstate.commands.fit.estimation import interpolated_rows

    counts = np.array([[3.0, 1.0], [0.0, 0.0], [2.0, 2.0], [0.0, 5.0]])  # contexts AA AC CA CC
    K, pc = 4.0, 1.0
    n0 = counts.sum(axis=0)  # [5, 8]
    p0 = (n0 + pc) / (n0.sum() + 2 * pc)
    n1 = {0: counts[0] + counts[2], 1: counts[1] + counts[3]}  # newest symbol A / C
    p1 = {s: (n1[s] + K * p0) / (n1[s].sum() + K) for s in (0, 1)}
    want = np.array([(counts[c] + K * p1[c % 2]) / (counts[c].sum() + K) for c in range(4)])
    got = interpolated_rows(counts, np.ones((4, 2), dtype=bool), 2, 2, K, pc)
    np.testing.assert_allclose(got, want, rtol=1e-12)
    # a structural zero stays zero and the row is renormalised
    allowed = np.ones((4, 2), dtype=bool)
    allowed[3, 0] = False
    got = interpolated_rows(counts, allowed, 2, 2, K, pc)
    assert got[3, 0] == 0.0 and got[3, 1] == 1.0
