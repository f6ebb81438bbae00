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
from numba import njit

#: Rescale a running vector when its sum falls below this value.
RESCALE_BELOW = 1e-100

_JIT = {"cache": True, "nogil": True, "error_model": "numpy"}


# ----------------------------------------------------------------- helpers
@njit(**_JIT)
def _forward_step(prev, cur, code, E, nz_ptr, nz_state, pred_ptr, pred_src, pred_p):
    """cur[t] = E[code, t] * sum_p prev[p] * a[p, t] for the emitting states; returns sum(cur)."""
    cur[:] = 0.0
    total = 0.0
    for k in range(nz_ptr[code], nz_ptr[code + 1]):
        t = nz_state[k]
        acc = 0.0
        for q in range(pred_ptr[t], pred_ptr[t + 1]):
            acc += prev[pred_src[q]] * pred_p[q]
        v = acc * E[code, t]
        cur[t] = v
        total += v
    return total


@njit(**_JIT)
def _backward_step(nxt, cur, code_next, E, nz_ptr, nz_state, succ_ptr, succ_dst, succ_p, w):
    """cur[s] = sum_t a[s, t] * E[code_next, t] * nxt[t]; returns sum(cur).  ``w`` is scratch."""
    m = cur.shape[0]
    w[:] = 0.0
    for k in range(nz_ptr[code_next], nz_ptr[code_next + 1]):
        t = nz_state[k]
        w[t] = E[code_next, t] * nxt[t]
    total = 0.0
    for s in range(m):
        acc = 0.0
        for q in range(succ_ptr[s], succ_ptr[s + 1]):
            acc += succ_p[q] * w[succ_dst[q]]
        cur[s] = acc
        total += acc
    return total


@njit(**_JIT)
def _first(start, cur, code, E, nz_ptr, nz_state):
    cur[:] = 0.0
    total = 0.0
    for k in range(nz_ptr[code], nz_ptr[code + 1]):
        t = nz_state[k]
        v = start[t] * E[code, t]
        cur[t] = v
        total += v
    return total


# ----------------------------------------------------------------- forward
@njit(**_JIT)
def forward_loglik(codes, start, end, E, nz_ptr, nz_state, pred_ptr, pred_src, pred_p):
    """Total log-likelihood (natural log) of one record; returns (loglik, fail_position)."""
    n = codes.shape[0]
    m = start.shape[0]
    a = np.empty(m)
    b = np.empty(m)
    logscale = 0.0
    total = _first(start, a, codes[0], E, nz_ptr, nz_state)
    if total == 0.0:
        return -np.inf, 0
    if total < RESCALE_BELOW:
        a *= 1.0 / total
        logscale += math.log(total)
    for i in range(1, n):
        total = _forward_step(a, b, codes[i], E, nz_ptr, nz_state, pred_ptr, pred_src, pred_p)
        if total < RESCALE_BELOW:
            if total == 0.0:
                return -np.inf, i
            b *= 1.0 / total
            logscale += math.log(total)
        a, b = b, a
    final = 0.0
    for s in range(m):
        final += a[s] * end[s]
    if final == 0.0:
        return -np.inf, n
    return math.log(final) + logscale, -1


# ----------------------------------------------------------------- posterior
@njit(**_JIT)
def posterior_checkpointed(codes, start, end, E, nz_ptr, nz_state, pred_ptr, pred_src,
                           pred_p, succ_ptr, succ_dst, succ_p, block, group, out,
                           alpha_ck, alpha_ck_log, beta_ck, beta_ck_log):
    """Posterior P(z_i = s | x) summed into ``out[i, group[s]]`` (group -1 = not written).

    Memory: O(block * M) working space plus the checkpoints.  Pass 1 runs backward
    over the record and keeps the backward vector at the last position of every
    block (``beta_ck``, with its natural-log scale in ``beta_ck_log``); pass 2 runs
    forward, recomputes each block's backward vectors from its checkpoint, and
    writes the posteriors.  The forward vector at the first position of each
    block is kept in ``alpha_ck``/``alpha_ck_log`` for later segment queries.
    ``block = N`` is the plain full-matrix algorithm.

    Returns (loglik, fail_position); ``out`` must be zero on entry.
    """
    n = codes.shape[0]
    m = start.shape[0]
    nblocks = (n + block - 1) // block
    w = np.empty(m)
    # ---- pass 1: backward, checkpoint at each block's last position
    cur = np.empty(m)
    nxt = np.empty(m)
    for s in range(m):
        nxt[s] = end[s]
    logscale = 0.0
    bsum = 0.0
    for s in range(m):
        bsum += nxt[s]
    if bsum < RESCALE_BELOW:
        if bsum == 0.0:
            return -np.inf, n
        nxt *= 1.0 / bsum
        logscale += math.log(bsum)
    last_block = nblocks - 1
    beta_ck[last_block, :] = nxt
    beta_ck_log[last_block] = logscale
    for i in range(n - 2, -1, -1):
        bsum = _backward_step(nxt, cur, codes[i + 1], E, nz_ptr, nz_state, succ_ptr, succ_dst,
                              succ_p, w)
        if bsum < RESCALE_BELOW:
            if bsum == 0.0:
                return -np.inf, i + 1
            cur *= 1.0 / bsum
            logscale += math.log(bsum)
        cur, nxt = nxt, cur
        if (i + 1) % block == 0:
            bk = (i + 1) // block - 1
            beta_ck[bk, :] = nxt
            beta_ck_log[bk] = logscale
    # ---- pass 2: forward with per-block backward recomputation
    buf = np.empty((min(block, n), m))
    alpha = np.empty(m)
    alpha2 = np.empty(m)
    gamma = np.empty(m)
    flog = 0.0
    for bk in range(nblocks):
        b0 = bk * block
        b1 = min(n, b0 + block)
        # recompute backward vectors of this block (scale per row is irrelevant)
        buf[b1 - 1 - b0, :] = beta_ck[bk, :]
        for i in range(b1 - 2, b0 - 1, -1):
            row = buf[i - b0]
            bsum = _backward_step(buf[i + 1 - b0], row, codes[i + 1], E, nz_ptr, nz_state,
                                  succ_ptr, succ_dst, succ_p, w)
            if bsum < RESCALE_BELOW and bsum > 0.0:
                row *= 1.0 / bsum
        for i in range(b0, b1):
            if i == 0:
                total = _first(start, alpha, codes[0], E, nz_ptr, nz_state)
            else:
                total = _forward_step(alpha, alpha2, codes[i], E, nz_ptr, nz_state, pred_ptr,
                                      pred_src, pred_p)
                alpha, alpha2 = alpha2, alpha
            if total < RESCALE_BELOW:
                if total == 0.0:
                    return -np.inf, i
                alpha *= 1.0 / total
                flog += math.log(total)
            if i == b0:
                alpha_ck[bk, :] = alpha
                alpha_ck_log[bk] = flog
            row = buf[i - b0]
            norm = 0.0
            for s in range(m):
                g = alpha[s] * row[s]
                gamma[s] = g
                norm += g
            if norm == 0.0:
                return -np.inf, i
            inv = 1.0 / norm
            for s in range(m):
                col = group[s]
                if col >= 0:
                    out[i, col] += gamma[s] * inv
    final = 0.0
    for s in range(m):
        final += alpha[s] * end[s]
    if final == 0.0:
        return -np.inf, n
    return math.log(final) + flog, -1


# ----------------------------------------------------------------- segments
@njit(**_JIT)
def vector_at(codes, pos, start, E, nz_ptr, nz_state, pred_ptr, pred_src, pred_p, block,
              alpha_ck, alpha_ck_log, out):
    """Forward vector at ``pos`` recomputed from the nearest checkpoint; returns its log scale.

    ``out * exp(returned log scale)`` is the unscaled forward probability
    P(x_0..x_pos, z_pos = s).
    """
    m = start.shape[0]
    bk = pos // block
    out[:] = alpha_ck[bk, :]
    logscale = alpha_ck_log[bk]
    tmp = np.empty(m)
    for i in range(bk * block + 1, pos + 1):
        total = _forward_step(out, tmp, codes[i], E, nz_ptr, nz_state, pred_ptr, pred_src,
                              pred_p)
        if total < RESCALE_BELOW and total > 0.0:
            tmp *= 1.0 / total
            logscale += math.log(total)
        out[:] = tmp
    return logscale


@njit(**_JIT)
def backward_vector_at(codes, pos, E, nz_ptr, nz_state, succ_ptr, succ_dst, succ_p, block,
                       beta_ck, beta_ck_log, out):
    """Backward vector at ``pos`` recomputed from its block's checkpoint; returns its log scale."""
    n = codes.shape[0]
    m = out.shape[0]
    bk = pos // block
    b1 = min(n, bk * block + block)
    out[:] = beta_ck[bk, :]
    logscale = beta_ck_log[bk]
    tmp = np.empty(m)
    w = np.empty(m)
    for i in range(b1 - 2, pos - 1, -1):
        total = _backward_step(out, tmp, codes[i + 1], E, nz_ptr, nz_state, succ_ptr, succ_dst,
                               succ_p, w)
        if total < RESCALE_BELOW and total > 0.0:
            tmp *= 1.0 / total
            logscale += math.log(total)
        out[:] = tmp
    return logscale


@njit(**_JIT)
def restricted_forward(codes, s0, e0, init, init_is_start, mask, use_emissions, E, nz_ptr,
                       nz_state, pred_ptr, pred_src, pred_p, out):
    """Forward over positions s0..e0-1 through the states with ``mask[s]`` only.

    ``init`` is the start vector (``init_is_start``) or the unrestricted forward
    vector at ``s0 - 1``.  With ``use_emissions`` false every emission factor is 1,
    which gives the prior probability of staying inside the mask.  Writes the
    final scaled vector to ``out`` and returns its natural-log scale, or -inf if
    no allowed path stays inside the mask.
    """
    m = init.shape[0]
    a = np.zeros(m)
    b = np.zeros(m)
    logscale = 0.0
    for i in range(s0, e0):
        code = codes[i]
        total = 0.0
        b[:] = 0.0
        if use_emissions:
            for k in range(nz_ptr[code], nz_ptr[code + 1]):
                t = nz_state[k]
                if not mask[t]:
                    continue
                if i == s0:
                    if init_is_start:
                        acc = init[t]
                    else:
                        acc = 0.0
                        for q in range(pred_ptr[t], pred_ptr[t + 1]):
                            acc += init[pred_src[q]] * pred_p[q]
                else:
                    acc = 0.0
                    for q in range(pred_ptr[t], pred_ptr[t + 1]):
                        acc += a[pred_src[q]] * pred_p[q]
                v = acc * E[code, t]
                b[t] = v
                total += v
        else:
            for t in range(m):
                if not mask[t]:
                    continue
                if i == s0:
                    if init_is_start:
                        acc = init[t]
                    else:
                        acc = 0.0
                        for q in range(pred_ptr[t], pred_ptr[t + 1]):
                            acc += init[pred_src[q]] * pred_p[q]
                else:
                    acc = 0.0
                    for q in range(pred_ptr[t], pred_ptr[t + 1]):
                        acc += a[pred_src[q]] * pred_p[q]
                b[t] = acc
                total += acc
        if total == 0.0:
            out[:] = 0.0
            return -np.inf
        if total < RESCALE_BELOW:
            b *= 1.0 / total
            logscale += math.log(total)
        a, b = b, a
    out[:] = a
    return logscale


# ----------------------------------------------------------------- Viterbi
@njit(**_JIT)
def _viterbi_step(prev, cur, bp, code, logE, nz_ptr, nz_state, pred_ptr, pred_src, pred_logp):
    """One max-product step in log space; ties go to the lowest from-state index."""
    cur[:] = -np.inf
    best_any = -np.inf
    for k in range(nz_ptr[code], nz_ptr[code + 1]):
        t = nz_state[k]
        best = -np.inf
        arg = -1
        for q in range(pred_ptr[t], pred_ptr[t + 1]):
            v = prev[pred_src[q]] + pred_logp[q]
            if v > best:
                best = v
                arg = pred_src[q]
        if arg >= 0:
            v = best + logE[code, t]
            cur[t] = v
            bp[t] = arg
            if v > best_any:
                best_any = v
    return best_any


@njit(**_JIT)
def viterbi_checkpointed(codes, log_start, log_end, logE, nz_ptr, nz_state, pred_ptr, pred_src,
                         pred_logp, block, path):
    """Most probable state path into ``path``; returns (log probability, fail_position).

    Log space (natural log), no scaling.  Ties: at every step the from-state with
    the lowest index wins, and at the end the lowest-index final state.  The
    delta vector is kept at the first position of each block; during traceback
    each block is recomputed with its back-pointers (O(block * M) memory).
    """
    n = codes.shape[0]
    m = log_start.shape[0]
    nblocks = (n + block - 1) // block
    ck = np.empty((nblocks, m))
    d = np.empty(m)
    d2 = np.empty(m)
    bp1 = np.empty(m, dtype=np.int32)
    code = codes[0]
    d[:] = -np.inf
    anyv = -np.inf
    for k in range(nz_ptr[code], nz_ptr[code + 1]):
        t = nz_state[k]
        v = log_start[t] + logE[code, t]
        d[t] = v
        if v > anyv:
            anyv = v
    if anyv == -np.inf:
        return -np.inf, 0
    ck[0, :] = d
    for i in range(1, n):
        anyv = _viterbi_step(d, d2, bp1, codes[i], logE, nz_ptr, nz_state, pred_ptr, pred_src,
                             pred_logp)
        if anyv == -np.inf:
            return -np.inf, i
        d, d2 = d2, d
        if i % block == 0:
            ck[i // block, :] = d
    best = -np.inf
    state = -1
    for s in range(m):
        v = d[s] + log_end[s]
        if v > best:
            best = v
            state = s
    if state < 0:
        return -np.inf, n
    # ---- traceback, one block at a time from the end
    bps = np.empty((min(block, n), m), dtype=np.int32)
    for bk in range(nblocks - 1, -1, -1):
        b0 = bk * block
        b1 = min(n, b0 + block)
        d[:] = ck[bk, :]
        for i in range(b0 + 1, b1):
            _viterbi_step(d, d2, bps[i - b0], codes[i], logE, nz_ptr, nz_state, pred_ptr,
                          pred_src, pred_logp)
            d, d2 = d2, d
        if bk < nblocks - 1:
            # state at b1 is known (path[b1]); pick its predecessor at b1 - 1
            t = path[b1]
            bestp = -np.inf
            arg = -1
            for q in range(pred_ptr[t], pred_ptr[t + 1]):
                v = d[pred_src[q]] + pred_logp[q]
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
