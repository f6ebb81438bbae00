"""Compiled HMM kernels (numba).  Arrays in, numbers out: no files, no labels, no printing.

Every kernel works on one record encoded as ``codes`` (one integer per position,
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

import math

import numpy as np
from numba import njit, uintp

from seqstate.engine._common import JIT as _JIT
from seqstate.engine._common import RESCALE_BELOW
from seqstate.engine.buffers import work_buffer


# ----------------------------------------------------------------- work arrays
# The kernels allocate no uninitialised memory: their work arrays come from
# :func:`seqstate.engine.buffers.work_buffer` (poisoned in tests) through these.
def posterior_scratch(n: int, m: int, block: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Work arrays ``(w, buf, gamma)`` of :func:`posterior_checkpointed` (N = ``n``, M = ``m``)."""
    return work_buffer(m), work_buffer((min(block, n), m)), work_buffer(m)


def viterbi_scratch(
    n: int, m: int, block: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Work arrays ``(ck, rows, bp1, bps)`` of :func:`viterbi_checkpointed`."""
    nblocks = (n + block - 1) // block
    return (
        work_buffer((nblocks, m)),
        work_buffer((2, m)),
        work_buffer((1, m), np.int32),
        work_buffer((min(block, n), m), np.int32),
    )


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


# ----------------------------------------------------------------- forward
@njit(**_JIT)
def forward_loglik(
    codes, start, end, E, nz_ptr, nz_state, pred_ptr, pred_src, pred_p, lim=RESCALE_BELOW
):
    """Total log-likelihood (natural log) of one record; returns (loglik, fail_position)."""
    n = codes.shape[0]
    m = start.shape[0]
    rows = np.zeros((2, m))
    logscale = 0.0
    total = _first(start, rows, 0, codes[0], E, nz_ptr, nz_state)
    if total == 0.0:
        return -np.inf, 0
    if total < lim:
        _scale(rows, 0, total)
        logscale += math.log(total)
    src = 0
    for i in range(1, n):
        dst = 1 - src
        total = _forward_step(
            rows, src, rows, dst, codes[i], E, nz_ptr, nz_state, pred_ptr, pred_src, pred_p
        )
        if total < lim:
            if total == 0.0:
                return -np.inf, i
            _scale(rows, dst, total)
            logscale += math.log(total)
        src = dst
    final = 0.0
    for s in range(m):
        final += rows[src, s] * end[s]
    if final == 0.0:
        return -np.inf, n
    return math.log(final) + logscale, -1


# ----------------------------------------------------------------- posterior
@njit(**_JIT)
def posterior_checkpointed(
    codes,
    start,
    end,
    E,
    nz_ptr,
    nz_state,
    pred_ptr,
    pred_src,
    pred_p,
    succ_ptr,
    succ_dst,
    succ_p,
    block,
    group,
    out,
    alpha_ck,
    alpha_ck_log,
    beta_ck,
    beta_ck_log,
    w,
    buf,
    gamma,
    lim=RESCALE_BELOW,
):
    """Posterior P(z_i = s | x) summed into ``out[i, group[s]]`` (group -1 = not written).

    Memory: O(block * M) working space plus the checkpoints.  Pass 1 runs backward
    over the record and keeps the backward vector at the last position of every
    block (``beta_ck``, with its natural-log scale in ``beta_ck_log``); pass 2 runs
    forward, recomputes each block's backward vectors from its checkpoint, and
    writes the posteriors.  The forward vector at the first position of each
    block is kept in ``alpha_ck``/``alpha_ck_log`` for later segment queries.
    ``block = N`` is the plain full-matrix algorithm.

    ``w``, ``buf`` and ``gamma`` are work arrays (see :func:`posterior_scratch`).
    Returns (loglik, fail_position); ``out`` must be zero on entry.
    """
    n = codes.shape[0]
    m = start.shape[0]
    nblocks = (n + block - 1) // block
    scatter = _scatter_codes(nz_ptr, nz_state, pred_ptr, pred_src.shape[0])
    # ---- pass 1: backward, checkpoint at each block's last position
    rows = np.zeros((2, m))
    src = 0
    bsum = 0.0
    for s in range(m):
        rows[0, s] = end[s]
        bsum += end[s]
    logscale = 0.0
    if bsum < lim:
        if bsum == 0.0:
            return -np.inf, n
        _scale(rows, 0, bsum)
        logscale += math.log(bsum)
    last_block = nblocks - 1
    for s in range(m):
        beta_ck[last_block, s] = rows[0, s]
    beta_ck_log[last_block] = logscale
    ckpos = ((n - 1) // block) * block  # next block start (going down) below n - 1
    for i in range(n - 2, -1, -1):
        dst = 1 - src
        cn = codes[i + 1]
        if scatter[cn]:
            bsum = _backward_scatter(
                rows, src, rows, dst, cn, E, nz_ptr, nz_state, pred_ptr, pred_src, pred_p
            )
        else:
            bsum = _backward_gather(
                rows, src, rows, dst, cn, E, nz_ptr, nz_state, succ_ptr, succ_dst, succ_p, w
            )
        if bsum < lim:
            if bsum == 0.0:
                return -np.inf, i + 1
            _scale(rows, dst, bsum)
            logscale += math.log(bsum)
        src = dst
        if i + 1 == ckpos:
            bk = ckpos // block - 1
            ckpos -= block
            for s in range(m):
                beta_ck[bk, s] = rows[dst, s]
            beta_ck_log[bk] = logscale
    # ---- pass 2: forward with per-block backward recomputation
    fw = np.zeros((2, m))
    fsrc = 0
    flog = 0.0
    for bk in range(nblocks):
        b0 = bk * block
        b1 = min(n, b0 + block)
        # recompute backward vectors of this block (scale per row is irrelevant)
        for s in range(m):
            buf[b1 - 1 - b0, s] = beta_ck[bk, s]
        for i in range(b1 - 2, b0 - 1, -1):
            r = i - b0
            cn = codes[i + 1]
            if scatter[cn]:
                bsum = _backward_scatter(
                    buf, r + 1, buf, r, cn, E, nz_ptr, nz_state, pred_ptr, pred_src, pred_p
                )
            else:
                bsum = _backward_gather(
                    buf, r + 1, buf, r, cn, E, nz_ptr, nz_state, succ_ptr, succ_dst, succ_p, w
                )
            if bsum < lim and bsum > 0.0:
                _scale(buf, r, bsum)
        for i in range(b0, b1):
            if i == 0:
                fsrc = 0
                total = _first(start, fw, 0, codes[0], E, nz_ptr, nz_state)
            else:
                fdst = 1 - fsrc
                total = _forward_step(
                    fw, fsrc, fw, fdst, codes[i], E, nz_ptr, nz_state, pred_ptr, pred_src, pred_p
                )
                fsrc = fdst
            if total < lim:
                if total == 0.0:
                    return -np.inf, i
                _scale(fw, fsrc, total)
                flog += math.log(total)
            if i == b0:
                for s in range(m):
                    alpha_ck[bk, s] = fw[fsrc, s]
                alpha_ck_log[bk] = flog
            r = i - b0
            norm = 0.0
            c = uintp(codes[i])
            k0 = uintp(nz_ptr[c])
            k1 = uintp(nz_ptr[c + _ONE])
            # only the emitting states have a forward value > 0
            for k in range(k0, k1):
                s = uintp(nz_state[k])
                g = fw[fsrc, s] * buf[r, s]
                gamma[s] = g
                norm += g
            if norm == 0.0:
                return -np.inf, i
            inv = 1.0 / norm
            for k in range(k0, k1):
                s = uintp(nz_state[k])
                col = group[s]
                if col >= 0:
                    out[i, col] += gamma[s] * inv
    final = 0.0
    for s in range(m):
        final += fw[fsrc, s] * end[s]
    if final == 0.0:
        return -np.inf, n
    return math.log(final) + flog, -1


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


@njit(**_JIT)
def viterbi_checkpointed(
    codes,
    log_start,
    log_end,
    logE,
    nz_ptr,
    nz_state,
    pred_ptr,
    pred_src,
    pred_logp,
    block,
    path,
    ck,
    rows,
    bp1,
    bps,
):
    """Most probable state path into ``path``; returns (log probability, fail_position).

    Log space (natural log), no scaling.  Ties: at every step the from-state with
    the lowest index wins, and at the end the lowest-index final state.  The
    delta vector is kept at the first position of each block; during traceback
    each block is recomputed with its back-pointers (O(block * M) memory).
    ``ck``, ``rows``, ``bp1`` and ``bps`` are work arrays (see :func:`viterbi_scratch`).
    """
    n = codes.shape[0]
    m = log_start.shape[0]
    nblocks = (n + block - 1) // block
    c = uintp(codes[0])
    for s in range(m):
        rows[0, s] = -np.inf
    anyv = -np.inf
    for k in range(uintp(nz_ptr[c]), uintp(nz_ptr[c + _ONE])):
        t = uintp(nz_state[k])
        v = log_start[t] + logE[c, t]
        rows[0, t] = v
        if v > anyv:
            anyv = v
    if anyv == -np.inf:
        return -np.inf, 0
    for s in range(m):
        ck[0, s] = rows[0, s]
    src = 0
    ckpos = block
    for i in range(1, n):
        dst = 1 - src
        anyv = _viterbi_step(
            rows,
            src,
            rows,
            dst,
            bp1,
            0,
            codes[i],
            logE,
            nz_ptr,
            nz_state,
            pred_ptr,
            pred_src,
            pred_logp,
        )
        if anyv == -np.inf:
            return -np.inf, i
        src = dst
        if i == ckpos:
            for s in range(m):
                ck[i // block, s] = rows[dst, s]
            ckpos += block
    best = -np.inf
    state = -1
    for s in range(m):
        v = rows[src, s] + log_end[s]
        if v > best:
            best = v
            state = s
    if state < 0:
        return -np.inf, n
    # ---- traceback, one block at a time from the end
    for bk in range(nblocks - 1, -1, -1):
        b0 = bk * block
        b1 = min(n, b0 + block)
        src = 0
        for s in range(m):
            rows[0, s] = ck[bk, s]
        for i in range(b0 + 1, b1):
            dst = 1 - src
            _viterbi_step(
                rows,
                src,
                rows,
                dst,
                bps,
                i - b0,
                codes[i],
                logE,
                nz_ptr,
                nz_state,
                pred_ptr,
                pred_src,
                pred_logp,
            )
            src = dst
        if bk < nblocks - 1:
            # state at b1 is known (path[b1]); pick its predecessor at b1 - 1
            t = path[b1]
            bestp = -np.inf
            arg = -1
            for q in range(pred_ptr[t], pred_ptr[t + 1]):
                v = rows[src, pred_src[q]] + pred_logp[q]
                if v > bestp:
                    bestp = v
                    arg = pred_src[q]
            state = arg
        path[b1 - 1] = state
        for i in range(b1 - 1, b0, -1):
            state = bps[i - b0, state]
            path[i - 1] = state
    return best, -1


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
