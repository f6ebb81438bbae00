"""No engine kernel reads a work buffer before writing it.

Every uninitialised array of :mod:`seqstate.engine` comes from
:func:`seqstate.engine.buffers.work_buffer`; in poisoned mode it is filled with
NaN (floats) or a poison integer.  Each kernel family (generic, small two-state,
chain-sparse; the gene-segment model on both the generic and the chain-sparse
path) runs posterior, Viterbi, forward/backward vectors and segment
probability / log-odds queries -- many of them on segments that do not start at
position 0 -- once with plain buffers and once poisoned: the results must be
identical bit for bit, finite where the model says so, and agree with the NumPy
reference (Rabiner 1989, section V.A scaled forward-backward, as implemented in
:mod:`seqstate.engine.reference`).

CI also runs every ``tests/test_engine_*.py`` module with
``SEQSTATE_POISON_BUFFERS=1``, so that every other engine test runs poisoned too.
"""

from __future__ import annotations

import ast
import math
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from helpers import kernel_family, sample_record

from seqstate.engine import api, buffers, reference
from seqstate.engine.generic import queries as kernels_query
from seqstate.engine.sparse import queries as sparse_query
from seqstate.io.tables import load_model

ENGINE = Path(api.__file__).resolve().parent


# ----------------------------------------------------------------- the helper itself
def test_work_buffer_is_poisoned_only_in_poisoned_mode():
    with buffers.poisoning(True):
        assert buffers.poisoned()
        f = buffers.work_buffer((3, 4))
        assert f.shape == (3, 4) and f.dtype == np.float64 and np.isnan(f).all()
        assert (buffers.work_buffer(5, np.int64) == -7777777).all()
        assert (buffers.work_buffer(5, np.int32) == -7777777).all()
        assert (buffers.work_buffer(5, np.int16) == np.iinfo(np.int16).min).all()
        assert (buffers.work_buffer(5, np.int8) == -128).all()
        assert (buffers.work_buffer(5, np.uint8) == 255).all()
        with buffers.poisoning(False):
            assert not buffers.poisoned()
            plain = buffers.work_buffer((2, 2), np.int32)
            assert plain.shape == (2, 2) and plain.dtype == np.int32
        assert buffers.poisoned()


def test_poison_flag_is_read_from_the_environment_at_import():
    code = "from seqstate.engine import buffers; print(buffers.poisoned())"
    root = str(Path(__file__).resolve().parent.parent)
    for value, want in (("1", "True"), ("yes", "True"), ("0", "False"), ("", "False")):
        env = dict(os.environ, SEQSTATE_POISON_BUFFERS=value, PYTHONPATH=root)
        out = subprocess.run(
            [sys.executable, "-c", code], env=env, capture_output=True, text=True, check=True
        )
        assert out.stdout.strip() == want, value


def test_no_engine_module_allocates_uninitialised_memory_itself():
    """np.empty / np.empty_like / np.ndarray(...) appear only inside buffers.py."""
    bad = []
    for path in sorted(ENGINE.rglob("*.py")):
        if path.name == "buffers.py":
            continue
        for node in ast.walk(ast.parse(path.read_text())):
            f = node.func if isinstance(node, ast.Call) else None
            if isinstance(f, ast.Attribute) and f.attr in ("empty", "empty_like", "ndarray"):
                if getattr(f.value, "id", "") in ("np", "numpy"):
                    bad.append(f"{path.name}:{node.lineno} np.{f.attr}")
    assert bad == []


# ----------------------------------------------------------------- the defect
def test_chain_sparse_restricted_forward_never_reads_the_work_array_it_is_given():
    """Restricted forward in slots from a forward vector at s0 - 1 > 0 (and from the
    start): the result must not depend on what the work array held (NaN, huge
    numbers or zeros).  Before the fix the dummy slot 0 of both rows was read."""
    model = load_model("gene-segment")
    t = api.prepare(model)
    assert t.kernels == "sparse"
    backend = t.backend
    sp = backend.sp
    codes = api.encode(t, _record(model, t, 1200, seed=7))
    post = api.posterior(t, codes, block=100)
    m = t.n_states
    labels = model.label_index()
    cases = 0
    for s0, e0 in ((0, 50), (1, 40), (301, 420), (777, 1000)):
        row = np.zeros((1, m + 2))
        if s0 > 0:
            vec, _ = api.forward_vector(t, codes, post, s0 - 1)
            sparse_query.to_slots(vec, sp.perm, row, 0)
        for mask in (labels == 0, labels != 0, np.ones(m, dtype=bool)):
            maskf = backend.mask_slots(mask)
            for use_e in (True, False):
                got = []
                for fill in (0.0, np.nan, 1e300, -3.0):
                    work = np.full((2, m + 2), fill)
                    ex = backend.restricted_slots(codes, s0, e0, row, s0 == 0, maskf, use_e, work)
                    got.append((ex, work[0].copy()))
                want_ex, want_row = got[0]
                if want_ex == -np.inf:
                    continue
                cases += 1
                assert np.isfinite(want_row).all()
                for ex, w in got[1:]:
                    assert ex == want_ex
                    assert np.array_equal(w, want_row)
    assert cases >= 6


# ----------------------------------------------------------------- every family, both modes
def _record(model, t, n, seed):
    """A record drawn from the model's own chain (so it is possible), a few N mixed in
    (tests/helpers.py sample_record)."""
    rng = np.random.default_rng(seed)
    return sample_record(rng, n, p_unknown=0.01, model=model, tables=t).encode("ascii")


def _queries(model, n):
    labels = model.label_index()
    masks = [labels == 0, labels != 0, labels == labels.max()]
    spans = [(0, 25), (1, 2), (3, 80), (n // 3, n // 3 + 120), (n // 2 + 1, n - 7), (n - 1, n)]
    return [(s0, e0, mk) for s0, e0 in spans for mk in masks]


def _run_all(t, model, codes, block):
    """Every kernel the pipeline uses, as a flat list of arrays and floats."""
    out = []
    m = t.n_states
    post = api.posterior(t, codes, block=block, dtype=np.float64)
    out += [post.loglik, post.values, post.alpha_ck, post.alpha_ck_log, post.beta_ck]
    labels = model.label_index()
    grouped = api.posterior(t, codes, group=labels, n_groups=int(labels.max()) + 1, block=block)
    out += [grouped.values]
    for b in (block, None):
        path, lp = api.viterbi(t, codes, block=b)
        out += [path, lp]
    n = codes.shape[0]
    for pos in (0, 1, n // 2, n - 2, n - 1):
        fv, fl = api.forward_vector(t, codes, post, pos)
        bv, bl = api.backward_vector(t, codes, post, pos)
        out += [fv, fl, bv, bl]
    for s0, e0, mask in _queries(model, n):
        out.append(api.segment_log_probability(t, codes, post, s0, e0, mask))
        out.append(api.segment_log_odds(t, codes, post, s0, e0, mask))
        if s0 == 0:
            init, is_start = t.start, True
        else:
            init, _ = api.forward_vector(t, codes, post, s0 - 1)
            is_start = False
        for use_e in (True, False):
            vec, lg = api.backend_of(t).restricted(codes, s0, e0, init, is_start, mask, use_e)
            out += [vec, lg]
    assert post.values.shape == (n, m)
    return out, post


def _same(a, b):
    if isinstance(a, np.ndarray):
        return a.dtype == b.dtype and a.shape == b.shape and np.array_equal(a, b, equal_nan=True)
    return a == b or (math.isnan(a) and math.isnan(b))


def _family_case(name, random_model, kernel_switch):
    rng = np.random.default_rng(11)
    if name == "small":
        model = random_model(rng, n_states=4, order=1, max_emitters=2)
        kind = "specialised"
    elif name == "generic":
        model = random_model(rng, n_states=5, order=2, with_end=True, p_forbid=0.2)
        kind = "generic"
    else:
        model = load_model("gene-segment")
        kind = "generic" if name == "gene-segment-generic" else "specialised"
    return model, kind


FAMILIES = ["small", "generic", "gene-segment-generic", "gene-segment-sparse"]


@pytest.mark.parametrize("name", FAMILIES)
@pytest.mark.parametrize("block", [37, None])
def test_kernels_give_identical_results_with_poisoned_buffers(
    name, block, random_model, kernel_switch
):
    model, kind = _family_case(name, random_model, kernel_switch)
    with kernel_switch(kind):
        t = api.prepare(model)
        want = {"gene-segment-sparse": "sparse", "gene-segment-generic": "generic"}
        assert kernel_family(t) == want.get(name, name)
        codes = api.encode(t, _record(model, t, 900, seed=5))
        with buffers.poisoning(False):
            plain, post = _run_all(t, model, codes, block)
        with buffers.poisoning(True):
            poisoned, _ = _run_all(t, model, codes, block)
    assert len(plain) == len(poisoned)
    for k, (a, b) in enumerate(zip(plain, poisoned)):
        assert _same(a, b), k
    assert np.isfinite(post.values).all() and np.isfinite(post.loglik)
    # the posterior against the NumPy reference (Rabiner 1989, section V.A)
    lattice = t.E[codes.astype(np.int64)]
    ll, ref = reference.forward_backward(t.start, t.transitions, t.end, lattice)
    assert abs(post.loglik - ll) <= 1e-9 * abs(ll)
    assert np.max(np.abs(post.values - ref)) <= 1e-9


def test_generic_restricted_forward_masked_path_with_poisoned_scratch():
    """The large-model restricted forward lists its masked states and moves in the
    scratch it is given: poisoned scratch, and scratch longer than needed, change
    nothing."""
    model = load_model("gene-segment")
    t = api.prepare(model)
    assert t.n_states >= kernels_query.RESTRICTED_MASKED_MIN
    codes = api.encode(t, _record(model, t, 600, seed=3))
    labels = model.label_index()
    nnz = t.pred_src.shape[0]
    post = api.posterior(t, codes)
    finite = 0
    for s0, e0 in ((0, 30), (250, 290)):
        init, is_start = (
            (t.start, True) if s0 == 0 else (api.forward_vector(t, codes, post, s0 - 1)[0], False)
        )
        for mask in (labels == 0, labels != 0, np.ones(t.n_states, dtype=bool)):
            results = []
            for fill_i, fill_f, extra in ((0, 0.0, 0), (-7777777, np.nan, 0), (-1, np.nan, 50)):
                out = np.full(t.n_states, np.nan)
                lg = kernels_query.restricted_forward(
                    codes,
                    s0,
                    e0,
                    init,
                    is_start,
                    mask,
                    True,
                    t.E,
                    t.nz_ptr,
                    t.nz_state,
                    t.pred_ptr,
                    t.pred_src,
                    t.pred_p,
                    out,
                    np.full(t.n_states + extra, fill_i, dtype=np.int64),
                    np.full(nnz + extra, fill_i, dtype=np.int64),
                    np.full(nnz + extra, fill_f),
                )
                results.append((lg, out))
            finite += bool(np.isfinite(results[0][0]))
            for lg, out in results[1:]:
                assert lg == results[0][0] and np.array_equal(out, results[0][1])
    assert finite >= 2
