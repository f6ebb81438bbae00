"""The generic family's compiled steps (numba): one forward, backward and Viterbi step each,
and the emission encoder.  The passes built from them are in
:mod:`seqstate.engine.generic.posterior` (forward, backward, posterior) and
:mod:`seqstate.engine.generic.viterbi` (Viterbi).  Arrays in, numbers out: no files, no
labels, no printing.

Every step works on one record encoded as ``codes`` (one integer per position,
see :mod:`seqstate.engine.api`) and on these tables, all plain arrays:

* ``start[M]``, ``end[M]`` -- start and end factors (``end`` is all ones when the
  model has no end table);
* ``pred_ptr[M+1], pred_src[nnz], pred_p[nnz]`` -- for each to-state ``t`` the
  allowed from-states ``pred_src[pred_ptr[t]:pred_ptr[t+1]]`` in increasing order
  with their probabilities (``pred_logp`` holds their natural logs);
* ``succ_ptr[M+1], succ_dst[nnz], succ_p[nnz]`` -- the same table by from-state;
* ``E[C, M]`` -- the emission factor of code ``c`` in state ``s`` (``logE`` its log);
* ``nz_ptr[C+1], nz_state[...]`` -- for each code the states whose factor is > 0,
  so that a position costs work only for the states that can emit its symbol.

Cost per position is O(allowed transitions into the emitting states), not O(M^2).

Scaling: forward and backward vectors are rescaled lazily, only when their sum
falls below :data:`RESCALE_BELOW`, and the natural log of every scale factor is
accumulated, so log-likelihoods are exact up to rounding (natural log).

Failure: kernels never raise; they return the first position at which every
state became impossible (or -1 when the record is possible).
"""

from __future__ import annotations

import numpy as np
from numba import njit, uintp

from seqstate.engine._common import JIT as _JIT

# ----------------------------------------------------------------- work arrays
# The kernels allocate no uninitialised memory: their work arrays come from
# :func:`seqstate.engine.buffers.work_buffer` (poisoned in tests) through these.
# ----------------------------------------------------------------- helpers
# Implementation notes (measured on the development machine):
# * Running vectors live in rows of 2-D arrays and the step helpers take the array
#   and a row index: taking a row view (``rows[i]``) per position costs reference
#   counting (atomic operations) that dominated small models.
# * Indices read from the tables are converted to unsigned (``uintp``) before they
#   index an array, so numba emits no negative-index wrap-around code (about 3x
#   faster sparse loops).  Never mix ``uintp`` with signed integers in arithmetic
#   (numba types uint64 + int64 as float64).
_ONE = uintp(1)


@njit(**_JIT)
def _forward_step(X, xr, Y, yr, code, E, nz_ptr, nz_state, pred_ptr, pred_src, pred_p):
    """Y[yr, t] = E[code, t] * sum_p X[xr, p] a[p, t] for the emitting t (0 elsewhere); sum."""
    m = Y.shape[1]
    for s in range(m):
        Y[yr, s] = 0.0
    c = uintp(code)
    total = 0.0
    for k in range(uintp(nz_ptr[c]), uintp(nz_ptr[c + _ONE])):
        t = uintp(nz_state[k])
        acc = 0.0
        for q in range(uintp(pred_ptr[t]), uintp(pred_ptr[t + _ONE])):
            acc += X[xr, uintp(pred_src[q])] * pred_p[q]
        v = acc * E[c, t]
        Y[yr, t] = v
        total += v
    return total


@njit(**_JIT)
def _backward_gather(X, xr, Y, yr, code_next, E, nz_ptr, nz_state, succ_ptr, succ_dst, succ_p, w):
    """Y[yr, s] = sum_t a[s, t] E[code_next, t] X[xr, t] over successors; sum.  ``w`` scratch."""
    m = Y.shape[1]
    for s in range(m):
        w[s] = 0.0
    c = uintp(code_next)
    for k in range(uintp(nz_ptr[c]), uintp(nz_ptr[c + _ONE])):
        t = uintp(nz_state[k])
        w[t] = E[c, t] * X[xr, t]
    total = 0.0
    for s in range(m):
        acc = 0.0
        for q in range(uintp(succ_ptr[s]), uintp(succ_ptr[s + 1])):
            acc += succ_p[q] * w[uintp(succ_dst[q])]
        Y[yr, s] = acc
        total += acc
    return total


@njit(**_JIT)
def _sum4(Y, yr, m):
    """Sum of Y[yr, :m] by four interleaved partial sums (no single chain of additions)."""
    t0 = t1 = t2 = t3 = 0.0
    s = 0
    while s + 4 <= m:
        t0 += Y[yr, s]
        t1 += Y[yr, s + 1]
        t2 += Y[yr, s + 2]
        t3 += Y[yr, s + 3]
        s += 4
    while s < m:
        t0 += Y[yr, s]
        s += 1
    return (t0 + t1) + (t2 + t3)


@njit(**_JIT)
def _forward_step_wide(X, xr, Y, yr, code, E, pred_ptr, pred_src, pred_p):
    """:func:`_forward_step` for large models: every state, no reset, a four-way total."""
    m = Y.shape[1]
    c = uintp(code)
    for t in range(m):
        acc = 0.0
        for q in range(uintp(pred_ptr[t]), uintp(pred_ptr[t + 1])):
            acc += X[xr, uintp(pred_src[q])] * pred_p[q]
        Y[yr, t] = acc * E[c, t]
    return _sum4(Y, yr, m)


@njit(**_JIT)
def _backward_gather_wide(X, xr, Y, yr, code_next, E, succ_ptr, succ_dst, succ_p, w):
    """:func:`_backward_gather` for large models: a four-way total."""
    m = Y.shape[1]
    c = uintp(code_next)
    for t in range(m):
        w[t] = E[c, t] * X[xr, t]
    for s in range(m):
        acc = 0.0
        for q in range(uintp(succ_ptr[s]), uintp(succ_ptr[s + 1])):
            acc += succ_p[q] * w[uintp(succ_dst[q])]
        Y[yr, s] = acc
    return _sum4(Y, yr, m)


@njit(**_JIT)
def _scatter_codes(nz_ptr, nz_state, pred_ptr, n_trans):
    """Per code, True when the backward step should scatter (see :func:`_backward_scatter`)."""
    n_codes = nz_ptr.shape[0] - 1
    flags = np.zeros(n_codes, dtype=np.bool_)
    for c in range(n_codes):
        into = 0
        for k in range(nz_ptr[c], nz_ptr[c + 1]):
            t = nz_state[k]
            into += pred_ptr[t + 1] - pred_ptr[t]
        flags[c] = 3 * into <= n_trans
    return flags


@njit(**_JIT)
def _backward_scatter(X, xr, Y, yr, code_next, E, nz_ptr, nz_state, pred_ptr, pred_src, pred_p):
    """The sums of :func:`_backward_gather`, scattered from the emitting states only.

    Costs the transitions into the states that can emit ``code_next`` instead of
    all transitions.  Each ``Y[yr, s]`` receives its terms in increasing ``t``, as
    in the gather (which only adds zeros besides), so both give identical results.
    Which one to use per code: :func:`_scatter_codes`.  (The choice is made at the
    call site: a branch inside a step helper made numba's loops several times
    slower.)
    """
    c = uintp(code_next)
    m = Y.shape[1]
    for s in range(m):
        Y[yr, s] = 0.0
    for k in range(uintp(nz_ptr[c]), uintp(nz_ptr[c + _ONE])):
        t = uintp(nz_state[k])
        wt = E[c, t] * X[xr, t]
        for q in range(uintp(pred_ptr[t]), uintp(pred_ptr[t + _ONE])):
            Y[yr, uintp(pred_src[q])] += pred_p[q] * wt
    total = 0.0
    for s in range(m):
        total += Y[yr, s]
    return total


@njit(**_JIT)
def _first(start, Y, yr, code, E, nz_ptr, nz_state):
    """Y[yr, t] = start[t] E[code, t]; returns the sum."""
    m = Y.shape[1]
    for s in range(m):
        Y[yr, s] = 0.0
    c = uintp(code)
    total = 0.0
    for k in range(uintp(nz_ptr[c]), uintp(nz_ptr[c + _ONE])):
        t = uintp(nz_state[k])
        v = start[t] * E[c, t]
        Y[yr, t] = v
        total += v
    return total


@njit(**_JIT)
def _scale(Y, yr, total):
    inv = 1.0 / total
    for s in range(Y.shape[1]):
        Y[yr, s] *= inv


# ----------------------------------------------------------------- Viterbi
@njit(**_JIT)
def _viterbi_step(X, xr, Y, yr, B, br, code, logE, nz_ptr, nz_state, pred_ptr, pred_src, pred_logp):
    """One max-product step in log space into Y[yr] with back-pointers B[br]; lowest index wins."""
    m = Y.shape[1]
    for s in range(m):
        Y[yr, s] = -np.inf
    c = uintp(code)
    best_any = -np.inf
    for k in range(uintp(nz_ptr[c]), uintp(nz_ptr[c + _ONE])):
        t = uintp(nz_state[k])
        best = -np.inf
        arg = -1
        for q in range(uintp(pred_ptr[t]), uintp(pred_ptr[t + _ONE])):
            p = pred_src[q]
            v = X[xr, uintp(p)] + pred_logp[q]
            if v > best:
                best = v
                arg = p
        if arg >= 0:
            v = best + logE[c, t]
            Y[yr, t] = v
            B[br, t] = arg
            if v > best_any:
                best_any = v
    return best_any


# ----------------------------------------------------------------- encoding
@njit(**_JIT)
def encode_codes(sym, order, n_symbols, offsets, unknown_code, out):
    """Per position the emission code: order-j context (longest clean suffix, j <= order).

    ``sym[i]`` is the symbol index or -1 for unknown.  Code = offsets[j] +
    context_j * A + sym, where context_j reads the previous j symbols in base A
    (oldest most significant); unknown symbols get ``unknown_code``.
    """
    n = sym.shape[0]
    run = 0  # clean symbols immediately before i (capped at order)
    ctx = 0  # the previous min(run, order) symbols in base A
    cap = 1
    for _ in range(order):
        cap *= n_symbols
    for i in range(n):
        x = sym[i]
        if x < 0:
            out[i] = unknown_code
            run = 0
            ctx = 0
            continue
        j = run if run < order else order
        out[i] = offsets[j] + ctx * n_symbols + x
        if order > 0:
            ctx = (ctx * n_symbols + x) % cap
            if run < order:
                run += 1
    return out
