"""Viterbi kernels that stream: a forward pass over chunks of codes, block tracebacks.

The kernels of :mod:`seqstate.engine.kernels`, :mod:`seqstate.engine.small` and
:mod:`seqstate.engine.sparse_query` decode a whole record held in memory.  Here the same
max-product steps (the families' own step helpers, or the same operations in the same
order) are cut into calls that a caller strings together:

* ``*_forward(codes, i0, ...)`` -- positions ``[i0, i0 + len(codes))`` of the record; the
  delta row of position ``i0 - 1`` is carried in ``rows`` (and ``carry``) from the previous
  call.  The row at every block start ``bk * block`` is stored in ``ck[bk]`` (the
  checkpoints), and from position ``tail0`` on the back-pointers of every position are kept
  in ``tail`` (row ``i - tail0 + 1``; row 0 takes the writes before ``tail0``), so that the
  last blocks need no second pass.  Returns -1, or the failing position.
* ``*_final(...)`` -- the best final state (lowest index among equals) and the path's log
  probability.
* ``*_block_path(codes, ck, bk, known, nxt, ...)`` -- recompute block ``bk`` from its
  checkpoint with its back-pointers and trace it back into ``out``; the state at the block's
  last position is ``known`` (>= 0), or the best predecessor of ``nxt``, the state at the
  position after the block (the step's own rule).
* ``*_tail_path(...)`` -- trace a block whose back-pointers are in ``tail``; returns the
  state at the position before the block.

State numbers are the family's own: original indices (generic), compact indices into the
position's emitting states (small), renumbered states (sparse); ``out`` always receives
original indices.  Coordinates are 0-based; scores are natural logs.  Ties: the lowest
predecessor index at every step, the lowest final state at the end, as the whole-record
kernels, so the paths and log probabilities are identical to theirs.  No I/O, no printing;
work arrays come from the caller (:mod:`seqstate.engine.buffers`).
"""

from __future__ import annotations

import numpy as np
from numba import njit, uintp

from seqstate.engine._common import JIT as _JIT
from seqstate.engine.kernels import _viterbi_step
from seqstate.engine.small import _wide_viterbi
from seqstate.engine.sparse_query import _all_impossible, _vit

_ONE = uintp(1)


@njit(**_JIT)
def _dummies(R, m):
    """The dummy slots 0 and M + 1 of both rows of ``R`` hold -inf (the steps read them)."""
    for r in range(2):
        R[r, 0] = -np.inf
        R[r, m + 1] = -np.inf


@njit(**_JIT)
def _first_ck(i0, block):
    """The first block start at or after ``max(i0, 1)``."""
    j = i0 if i0 > 1 else 1
    return ((j + block - 1) // block) * block


# ----------------------------------------------------------------- generic
@njit(**_JIT)
def generic_forward(
    codes,
    i0,
    block,
    tail0,
    rows,
    carry,
    ck,
    tail,
    log_start,
    logE,
    nz_ptr,
    nz_state,
    pred_ptr,
    pred_src,
    pred_logp,
):
    """Forward max-product over positions ``[i0, i0 + len(codes))``; ``rows`` (2, M) holds the
    delta row of ``i0 - 1`` in row ``carry[0]`` (updated on return).  Returns -1 or the first
    position at which every state is impossible."""
    n1 = codes.shape[0]
    m = rows.shape[1]
    src = carry[0]
    j0 = 0
    if i0 == 0:
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
            return 0
        for s in range(m):
            ck[0, s] = rows[0, s]
        src = 0
        j0 = 1
    ckpos = _first_ck(i0, block)
    for j in range(j0, n1):
        i = i0 + j
        dst = 1 - src
        br = i - tail0 + 1 if i >= tail0 else 0
        anyv = _viterbi_step(
            rows, src, rows, dst, tail, br, codes[j], logE, nz_ptr, nz_state, pred_ptr, pred_src,
            pred_logp,
        )  # fmt: skip
        if anyv == -np.inf:
            return i
        src = dst
        if i == ckpos:
            bk = i // block
            for s in range(m):
                ck[bk, s] = rows[dst, s]
            ckpos += block
    carry[0] = src
    return -1


@njit(**_JIT)
def generic_final(rows, carry, log_end):
    """(log probability, best final state or -1): lowest index among equal scores."""
    src = carry[0]
    best = -np.inf
    state = -1
    for s in range(rows.shape[1]):
        v = rows[src, s] + log_end[s]
        if v > best:
            best = v
            state = s
    return best, state


@njit(**_JIT)
def generic_block_path(
    codes, ck, bk, known, nxt, rows, bps, out, logE, nz_ptr, nz_state, pred_ptr, pred_src,
    pred_logp,
):  # fmt: skip
    """Block ``bk`` (``codes`` its positions) recomputed from ``ck[bk]``, traced into ``out``."""
    n1 = codes.shape[0]
    m = rows.shape[1]
    for s in range(m):
        rows[0, s] = ck[bk, s]
    src = 0
    for r in range(1, n1):
        dst = 1 - src
        _viterbi_step(
            rows, src, rows, dst, bps, r, codes[r], logE, nz_ptr, nz_state, pred_ptr, pred_src,
            pred_logp,
        )  # fmt: skip
        src = dst
    state = known
    if state < 0:
        bestp = -np.inf
        for q in range(pred_ptr[nxt], pred_ptr[nxt + 1]):
            v = rows[src, pred_src[q]] + pred_logp[q]
            if v > bestp:
                bestp = v
                state = pred_src[q]
    out[n1 - 1] = state
    for r in range(n1 - 1, 0, -1):
        state = bps[r, state]
        out[r - 1] = state


@njit(**_JIT)
def generic_tail_path(b0, b1, tail0, tail, known, out):
    """Trace ``[b0, b1)`` through the kept back-pointers; returns the state at ``b0 - 1``."""
    state = known
    out[b1 - b0 - 1] = state
    for i in range(b1 - 1, b0, -1):
        state = tail[i - tail0 + 1, state]
        out[i - 1 - b0] = state
    if b0 == 0:
        return -1
    return tail[b0 - tail0 + 1, state]


# ----------------------------------------------------------------- small (two states per code)
@njit(**_JIT)
def small_forward(
    codes, i0, block, tail0, da, va, bpa, carry, ck, tail, log_start, K, st, wide, cls, LT, LE,
    logT, logE,
):  # fmt: skip
    """Forward over ``[i0, i0 + len(codes))`` in compact indices (the steps of
    the compact tables of :mod:`seqstate.engine.small`); ``da`` holds the compact delta row of
    ``i0 - 1`` and ``carry[0]`` its code.  Returns -1 or the failing position."""
    n1 = codes.shape[0]
    kmax = st.shape[1]
    j0 = 0
    if i0 == 0:
        c = codes[0]
        anyv = -np.inf
        for k in range(kmax):
            if k < K[c]:
                v = log_start[st[c, k]] + logE[c, st[c, k]]
            else:
                v = -np.inf
            da[k] = v
            if v > anyv:
                anyv = v
        if anyv == -np.inf:
            return 0
        ck[0, :] = da
        carry[0] = c
        j0 = 1
    cp = carry[0]
    d0 = da[0]
    d1 = da[1]
    ckpos = _first_ck(i0, block)
    for j in range(j0, n1):
        i = i0 + j
        c = codes[j]
        br = i - tail0 + 1 if i >= tail0 else 0
        if wide[cp] or wide[c]:
            if not wide[cp]:
                da[0] = d0
                da[1] = d1
            anyv = _wide_viterbi(da, cp, va, bpa, c, K, st, logT, logE)
            if anyv == -np.inf:
                return i
            for k in range(kmax):
                tail[br, k] = bpa[k]
                da[k] = va[k]
            d0 = da[0]
            d1 = da[1]
        else:
            q = cls[cp]
            r = cls[c]
            a0 = d0 + LT[q, r, 0]
            a1 = d1 + LT[q, r, 2]
            if a1 > a0:
                m0 = a1
                tail[br, 0] = 1
            else:
                m0 = a0
                tail[br, 0] = 0
            a0 = d0 + LT[q, r, 1]
            a1 = d1 + LT[q, r, 3]
            if a1 > a0:
                m1 = a1
                tail[br, 1] = 1
            else:
                m1 = a0
                tail[br, 1] = 0
            d0 = m0 + LE[c, 0]
            d1 = m1 + LE[c, 1]
            if d0 == -np.inf and d1 == -np.inf:
                return i
        cp = c
        if i == ckpos:
            ckpos += block
            if not wide[c]:
                da[0] = d0
                da[1] = d1
                for k in range(2, kmax):
                    da[k] = -np.inf
            ck[i // block, :] = da
    if not wide[cp]:
        da[0] = d0
        da[1] = d1
        for k in range(2, kmax):
            da[k] = -np.inf
    carry[0] = cp
    return -1


@njit(**_JIT)
def small_final(da, carry, K, st, log_end):
    """(log probability, best final compact index or -1)."""
    cp = carry[0]
    best = -np.inf
    kbest = -1
    for k in range(K[cp]):
        v = da[k] + log_end[st[cp, k]]
        if v > best:
            best = v
            kbest = k
    return best, kbest


@njit(**_JIT)
def small_block_path(
    codes, ck, bk, known, nxt, da, va, bpa, bps, out, K, st, wide, cls, LT, LE, logT, logE
):
    """Block ``bk`` recomputed from ``ck[bk]`` (compact), traced into ``out`` (original
    states); ``known`` is a compact index at the block's last position, ``nxt`` an original
    state at the next position."""
    n1 = codes.shape[0]
    kmax = st.shape[1]
    for k in range(kmax):
        da[k] = ck[bk, k]
    d0 = da[0]
    d1 = da[1]
    cp = codes[0]
    for r in range(1, n1):
        c = codes[r]
        if wide[cp] or wide[c]:
            if not wide[cp]:
                da[0] = d0
                da[1] = d1
            _wide_viterbi(da, cp, va, bpa, c, K, st, logT, logE)
            for k in range(kmax):
                bps[r, k] = bpa[k]
                da[k] = va[k]
            d0 = da[0]
            d1 = da[1]
        else:
            q = cls[cp]
            q2 = cls[c]
            a0 = d0 + LT[q, q2, 0]
            a1 = d1 + LT[q, q2, 2]
            if a1 > a0:
                m0 = a1
                bps[r, 0] = 1
            else:
                m0 = a0
                bps[r, 0] = 0
            a0 = d0 + LT[q, q2, 1]
            a1 = d1 + LT[q, q2, 3]
            if a1 > a0:
                m1 = a1
                bps[r, 1] = 1
            else:
                m1 = a0
                bps[r, 1] = 0
            d0 = m0 + LE[c, 0]
            d1 = m1 + LE[c, 1]
        cp = c
    if not wide[cp]:
        da[0] = d0
        da[1] = d1
    kcur = known
    if kcur < 0:
        bestp = -np.inf
        arg = -1
        for j in range(K[cp]):
            v = da[j] + logT[st[cp, j], nxt]
            if v > bestp:
                bestp = v
                arg = j
        kcur = arg if arg >= 0 else 0
    out[n1 - 1] = st[cp, kcur]
    for r in range(n1 - 1, 0, -1):
        kcur = bps[r, kcur]
        out[r - 1] = st[codes[r - 1], kcur]


@njit(**_JIT)
def small_tail_path(codes, b0, tail0, tail, known, st, out):
    """Trace ``[b0, b0 + len(codes))`` through the kept compact back-pointers; returns the
    compact index at ``b0 - 1`` (-1 at the record start)."""
    n1 = codes.shape[0]
    kcur = known
    out[n1 - 1] = st[codes[n1 - 1], kcur]
    for r in range(n1 - 1, 0, -1):
        kcur = tail[b0 + r - tail0 + 1, kcur]
        out[r - 1] = st[codes[r - 1], kcur]
    if b0 == 0:
        return -1
    return tail[b0 - tail0 + 1, kcur]


# ----------------------------------------------------------------- sparse (chains)
@njit(**_JIT)
def sparse_forward(
    codes,
    i0,
    block,
    tail0,
    rows,
    carry,
    ck,
    tail,
    log_start,
    logE,
    la1,
    f_ptr,
    f_n0,
    f_dst,
    f_src,
    f_lp,
    f_rank,
    f_col,
):
    """Forward over ``[i0, i0 + len(codes))`` in the renumbered slots (the steps of
    the chain-sparse layout of :mod:`seqstate.engine.sparse`); ``rows`` (2, M + 2), the row
    of ``i0 - 1`` in row ``carry[0]``.  Impossibility is checked at every block end and at the
    call's end (as that kernel does): returns -1, or a position at or after the first failing
    one (:func:`sparse_locate` finds it)."""
    n1 = codes.shape[0]
    m = rows.shape[1] - 2
    src = carry[0]
    j0 = 0
    if i0 == 0:
        _dummies(rows, m)
        for s in range(m + 2):
            rows[0, s] = -np.inf
        c = uintp(codes[0])
        for t in range(m):
            rows[0, t + 1] = log_start[t] + logE[c, t]
        if _all_impossible(rows, 0, m):
            return 0
        for s in range(m + 2):
            ck[0, s] = rows[0, s]
        src = 0
        j0 = 1
    ckpos = _first_ck(i0, block)
    for j in range(j0, n1):
        i = i0 + j
        dst = 1 - src
        br = i - tail0 + 1 if i >= tail0 else 0
        _vit(
            rows, src, rows, dst, tail, br, codes[j], m, la1, logE, f_ptr, f_n0, f_dst, f_src,
            f_lp, f_rank, f_col,
        )  # fmt: skip
        src = dst
        if i == ckpos:
            for s in range(m + 2):
                ck[i // block, s] = rows[dst, s]
            ckpos += block
        if i == ckpos - 1 and _all_impossible(rows, dst, m):
            return i
    carry[0] = src
    if _all_impossible(rows, src, m):
        return i0 + n1 - 1
    return -1


@njit(**_JIT)
def sparse_locate(codes, i0, row, work, bps, la1, logE, f_ptr, f_n0, f_dst, f_src, f_lp, f_rank,
                  f_col):  # fmt: skip
    """The first impossible position at or after ``i0 + 1``, stepping from ``row`` (the
    possible delta row at ``i0``; ``codes`` the positions from ``i0``); -1 if none."""
    m = work.shape[1] - 2
    _dummies(work, m)
    for s in range(m + 2):
        work[0, s] = row[s]
    src = 0
    for j in range(1, codes.shape[0]):
        dst = 1 - src
        _vit(
            work, src, work, dst, bps, 0, codes[j], m, la1, logE, f_ptr, f_n0, f_dst, f_src,
            f_lp, f_rank, f_col,
        )  # fmt: skip
        src = dst
        if _all_impossible(work, dst, m):
            return i0 + j
    return -1


@njit(**_JIT)
def sparse_final(rows, carry, inv, log_end):
    """(log probability, best final state (renumbered) or -1): lowest original index wins."""
    src = carry[0]
    best = -np.inf
    state = -1
    for s in range(log_end.shape[0]):
        v = rows[src, inv[s] + 1] + log_end[s]
        if v > best:
            best = v
            state = s
    if state < 0:
        return best, -1
    return best, inv[state]


@njit(**_JIT)
def sparse_block_path(
    codes, ck, bk, known, nxt, rows, bps, out, perm, la1, logE, f_ptr, f_n0, f_dst, f_src, f_lp,
    f_rank, f_col, tb_prev, tb_col, p_ptr, p_src, p_lp,
):  # fmt: skip
    """Block ``bk`` recomputed from ``ck[bk]``, traced into ``out`` (original states);
    ``known`` a renumbered state at the block's last position, ``nxt`` one at the next."""
    n1 = codes.shape[0]
    m = rows.shape[1] - 2
    _dummies(rows, m)
    for s in range(m + 2):
        rows[0, s] = ck[bk, s]
    src = 0
    for r in range(1, n1):
        dst = 1 - src
        _vit(
            rows, src, rows, dst, bps, r, codes[r], m, la1, logE, f_ptr, f_n0, f_dst, f_src,
            f_lp, f_rank, f_col,
        )  # fmt: skip
        src = dst
    state = known
    if state < 0:
        if tb_prev[nxt] >= 0:
            state = tb_prev[nxt]
        else:
            bestp = -np.inf
            pick = p_src[p_ptr[nxt]]
            for q in range(p_ptr[nxt], p_ptr[nxt + 1]):
                v = rows[src, p_src[q]] + p_lp[q]
                if v > bestp:
                    bestp = v
                    pick = p_src[q]
            state = pick - 1
    out[n1 - 1] = perm[state]
    for r in range(n1 - 1, 0, -1):
        p = tb_prev[state]
        if p >= 0:
            state = p
        else:
            state = p_src[p_ptr[state] + bps[r, tb_col[state]]] - 1
        out[r - 1] = perm[state]
    return state


@njit(**_JIT)
def sparse_tail_path(b0, b1, tail0, tail, known, out, perm, tb_prev, tb_col, p_ptr, p_src):
    """Trace ``[b0, b1)`` through the kept back-pointer ranks; returns the renumbered state at
    ``b0 - 1`` (-1 at the record start)."""
    state = known
    out[b1 - b0 - 1] = perm[state]
    for i in range(b1 - 1, b0 - 1, -1):
        if i == 0:
            return -1
        p = tb_prev[state]
        if p >= 0:
            state = p
        else:
            state = p_src[p_ptr[state] + tail[i - tail0 + 1, tb_col[state]]] - 1
        if i > b0:
            out[i - 1 - b0] = perm[state]
    return state
