"""Viterbi of the chain-sparse family, in the renumbered slots of
:mod:`seqstate.engine.sparse.tables`: the calls of :mod:`seqstate.engine.generic.viterbi`
(``forward``, ``final``, ``block_path``, ``tail_path``; same contract, same tie rule) and
``locate``, the first failing position of a record (impossibility is checked at block ends).
"""

from __future__ import annotations

import numpy as np
from numba import njit, uintp

from seqstate.engine._common import JIT as _JIT
from seqstate.engine.generic.viterbi import _first_ck
from seqstate.engine.sparse.queries import _all_impossible, _vit

_ONE = uintp(1)


@njit(**_JIT)
def _dummies(R, m):
    """The dummy slots 0 and M + 1 of both rows of ``R`` hold -inf (the steps read them)."""
    for r in range(2):
        R[r, 0] = -np.inf
        R[r, m + 1] = -np.inf


@njit(**_JIT)
def forward(
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
    one (:func:`locate` finds it)."""
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
def locate(codes, i0, row, work, bps, la1, logE, f_ptr, f_n0, f_dst, f_src, f_lp, f_rank,
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
def final(rows, carry, inv, log_end):
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
def block_path(
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
def tail_path(b0, b1, tail0, tail, known, out, perm, tb_prev, tb_col, p_ptr, p_src):
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
