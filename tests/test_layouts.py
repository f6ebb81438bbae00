"""Derived layouts: the eight-state CpG model against the two-state model it comes from.

The one-state-per-symbol layout is an exact rewrite of an order-1 model as an
order-0 model (common practice: a first-order emission chain folded into the
hidden state), so on sequences without unknown bases both give the same
likelihood and the same per-label posteriors.
"""

from __future__ import annotations

import importlib.util
from pathlib import Path

import numpy as np
import pytest

from seqstate.engine import api
from seqstate.io.tables import load_model, render_tables
from seqstate.kinds.layouts import expand_to_symbol_states

REPO = Path(__file__).resolve().parent.parent


def _island_posterior(model, seq):
    tables = api.prepare(model)
    codes = api.encode(tables, seq)
    labels = model.labels
    assert labels == ["CpG_island"]
    post = api.posterior(tables, codes, group=model.label_index(), n_groups=1, dtype=np.float64)
    return post.loglik, post.values[:, 0], api.loglik(tables, codes)


@pytest.fixture(scope="module")
def record():
    rng = np.random.default_rng(20_000)
    # a random background with two CG-rich stretches so that the island posterior
    # moves through its whole range
    parts = [
        "".join("ACGT"[i] for i in rng.integers(4, size=8000)),
        "".join("ACGT"[i] for i in rng.choice(4, size=2500, p=[0.15, 0.35, 0.35, 0.15])),
        "".join("ACGT"[i] for i in rng.integers(4, size=6000)),
        "".join("CG"[i] for i in rng.integers(2, size=1500)),
        "".join("ACGT"[i] for i in rng.integers(4, size=2000)),
    ]
    seq = "".join(parts)
    assert len(seq) == 20_000
    return seq


def test_cpg8_matches_cpg2_on_random_sequence(kernel, record):
    ll2, p2, f2 = _island_posterior(load_model("cpg-island"), record)
    ll8, p8, f8 = _island_posterior(load_model("cpg-island-8"), record)
    # the expanded layout is the same distribution over sequences and labels
    # (expand_to_symbol_states docstring; common practice)
    assert abs(ll8 - ll2) <= 1e-9 * abs(ll2)
    assert abs(f8 - f2) <= 1e-9 * abs(f2)
    np.testing.assert_allclose(p8, p2, rtol=0, atol=1e-9)
    # the record really exercises the posterior (not all near 0 or all near 1)
    assert p2.max() > 0.9 and p2.min() < 0.1


def test_cpg8_viterbi_labels_match_cpg2(kernel, record):
    two, eight = load_model("cpg-island"), load_model("cpg-island-8")
    t2, t8 = api.prepare(two), api.prepare(eight)
    path2, lp2 = api.viterbi(t2, api.encode(t2, record))
    path8, lp8 = api.viterbi(t8, api.encode(t8, record))
    # each path of the two-state model is exactly one path of the eight-state model
    # with the same probability, so the best paths and their labels agree
    assert abs(lp8 - lp2) <= 1e-9 * abs(lp2)
    lab2 = two.label_index()[path2.astype(np.int64)]
    lab8 = eight.label_index()[path8.astype(np.int64)]
    assert np.array_equal(lab2, lab8)
    # and the eight-state path emits the record: state (s, x) at a base x
    sym8 = np.array([eight.state_names[s][-1] for s in path8])
    assert "".join(sym8) == record


def test_expanded_random_order1_model_matches(kernel, random_model, random_sequence):
    rng = np.random.default_rng(88)
    for with_end in (False, True):
        model = random_model(
            rng, n_states=3, order=1, with_end=with_end, p_forbid=0.2, lower_rows=True
        )
        big = expand_to_symbol_states(model)
        seq = random_sequence(rng, 500)
        t1, t2 = api.prepare(model), api.prepare(big)
        c1, c2 = api.encode(t1, seq), api.encode(t2, seq)
        g1, g2 = model.label_index(), big.label_index()
        n = len(model.labels)
        p1 = api.posterior(t1, c1, group=g1, n_groups=n, dtype=np.float64)
        p2 = api.posterior(t2, c2, group=g2, n_groups=n, dtype=np.float64)
        assert abs(p1.loglik - p2.loglik) <= 1e-9 * abs(p1.loglik)
        np.testing.assert_allclose(p2.values, p1.values, rtol=0, atol=1e-9)


def _build_module():
    spec = importlib.util.spec_from_file_location(
        "seqstate_models_build", REPO / "models" / "build.py"
    )
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_shipped_cpg8_equals_fresh_build():
    fresh = _build_module().build_cpg8()
    shipped = load_model(REPO / "models" / "cpg-island-8")
    for (name_a, text_a), (name_b, text_b) in zip(
        render_tables(shipped), render_tables(fresh), strict=True
    ):
        assert name_a == name_b
        assert text_a == text_b, name_a
    _assert_files_are_the_build(fresh, "cpg-island-8")


def _assert_files_are_the_build(fresh, folder: str) -> None:
    """The shipped folder holds the model models/build.py makes, byte for byte."""
    assert load_model(REPO / "models" / folder).equals(fresh)
    for name, text in render_tables(fresh):
        assert (REPO / "models" / folder / name).read_text(encoding="utf-8") == text


def test_shipped_plant_layout_equals_fresh_build():
    fresh = _build_module().build_plant_layout()
    _assert_files_are_the_build(fresh, "gene-segment-layout-plant")
    shipped = load_model(REPO / "models" / "gene-segment-layout-plant")
    # GC donors are what sets the plant layout apart from gene-segment-layout
    assert any(name.startswith("i0_d2c") for name in shipped.state_names)
    assert not any(
        name.startswith("i0_d2c")
        for name in load_model(REPO / "models" / "gene-segment-layout").state_names
    )
