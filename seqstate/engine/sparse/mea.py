"""MEA kernels in the renumbered slots of the chain-sparse family (see engine.sparse).

The path of :mod:`seqstate.engine.mea` (the best sum of class gains over allowed moves),
computed with the chain-sparse layout: a contiguous pass over every state for the states
linked to the one numbered before (``(x[t] + lin[t]) + ge[t]``, ``lin`` 0 where linked,
-inf elsewhere, ``ge`` the position's gain of the state's class, -inf where it cannot emit),
then the other states from their predecessor lists per code (first predecessor assigned,
later ones replace it only when strictly greater, so the lowest original index wins).  Values
equal :func:`seqstate.engine.mea._mea_step`'s exactly (adding 0.0 changes no value), so the
paths are identical.  Impossibility is checked at block ends, as the sparse Viterbi kernels
do; :func:`slot_locate` finds the first failing position.  No I/O, work arrays from the
caller.  Coordinates 0-based.
"""

from __future__ import annotations

import numpy as np
from numba import njit, uintp

from seqstate.engine._common import JIT as _JIT
from seqstate.engine.sparse.queries import _all_impossible

_ONE = uintp(1)


@njit(**_JIT)
def _slot_step(R, xr, S, yr, B, br, c, G, gr, ge, lin, emadd, clsp, ptr, n0, dst, src, rank, col):
    """One MEA step R[xr] -> S[yr] in slots with gain row G[gr]; ranks into B[br].  (The gain
    row is passed as array and index: a row view per position costs reference counting.)"""
    m = ge.shape[0]
    c = uintp(c)
    gr = uintp(gr)
    for t in range(m):
        ge[t] = G[gr, uintp(clsp[t])] + emadd[c, t]
    for t in range(m):
        S[yr, t + 1] = (R[xr, t] + lin[t]) + ge[t]
    lo = uintp(ptr[c])
    mid = lo + uintp(n0[c])
    hi = uintp(ptr[c + _ONE])
    for q in range(lo, mid):
        S[yr, uintp(dst[q])] = R[xr, uintp(src[q])]
        B[br, uintp(col[q])] = 0
    for q in range(mid, hi):
        d = uintp(dst[q])
        v = R[xr, uintp(src[q])]
        if v > S[yr, d]:
            S[yr, d] = v
            B[br, uintp(col[q])] = rank[q]
    for q in range(lo, mid):
        d = uintp(dst[q])
        S[yr, d] = S[yr, d] + ge[d - _ONE]


@njit(**_JIT)
def _dummies(R, m):
    for r in range(2):
        R[r, 0] = -np.inf
        R[r, m + 1] = -np.inf


@njit(**_JIT)
def slot_forward(
    codes, gain, i0, block, tail0, rows, carry, ck, tail, ge, inv, cls, emit, start_ok, lin,
    emadd, clsp, ptr, n0, dst, src, rank, col,
):  # fmt: skip
    """Forward over ``[i0, i0 + len(codes))`` (``gain`` their rows, original class order);
    ``rows`` (2, M + 2) holds the row of ``i0 - 1`` in row ``carry[0]``.  Checkpoints at block
    starts into ``ck``, ranks from ``tail0`` on into ``tail`` (row ``i - tail0 + 1``).
    Returns -1, or a position at or after the first one no allowed path reaches."""
    n1 = codes.shape[0]
    m = rows.shape[1] - 2
    src_r = carry[0]
    j0 = 0
    if i0 == 0:
        _dummies(rows, m)
        c = codes[0]
        for j in range(m):
            s = inv[j] + 1
            if start_ok[j] and emit[c, j]:
                rows[0, s] = gain[0, cls[j]]
            else:
                rows[0, s] = -np.inf
        if _all_impossible(rows, 0, m):
            return 0
        for s in range(m + 2):
            ck[0, s] = rows[0, s]
        src_r = 0
        j0 = 1
    first = i0 if i0 > 1 else 1
    ckpos = ((first + block - 1) // block) * block
    for r in range(j0, n1):
        i = i0 + r
        dst_r = 1 - src_r
        br = i - tail0 + 1 if i >= tail0 else 0
        _slot_step(
            rows, src_r, rows, dst_r, tail, br, codes[r], gain, r, ge, lin, emadd, clsp, ptr, n0,
            dst, src, rank, col,
        )  # fmt: skip
        src_r = dst_r
        if i == ckpos:
            for s in range(m + 2):
                ck[i // block, s] = rows[dst_r, s]
            ckpos += block
        if i == ckpos - 1 and _all_impossible(rows, dst_r, m):
            return i
    carry[0] = src_r
    if _all_impossible(rows, src_r, m):
        return i0 + n1 - 1
    return -1


@njit(**_JIT)
def slot_locate(
    codes, gain, i0, row, work, bps, ge, lin, emadd, clsp, ptr, n0, dst, src, rank, col
):
    """The first position after ``i0`` no allowed path reaches, stepping from ``row`` (the
    possible row at ``i0``; ``codes``/``gain`` from ``i0``); -1 if none."""
    m = work.shape[1] - 2
    _dummies(work, m)
    for s in range(m + 2):
        work[0, s] = row[s]
    src_r = 0
    for r in range(1, codes.shape[0]):
        dst_r = 1 - src_r
        _slot_step(
            work, src_r, work, dst_r, bps, 0, codes[r], gain, r, ge, lin, emadd, clsp, ptr, n0,
            dst, src, rank, col,
        )  # fmt: skip
        src_r = dst_r
        if _all_impossible(work, dst_r, m):
            return i0 + r
    return -1


@njit(**_JIT)
def slot_final(rows, carry, inv, end_ok):
    """(total gain, best final state renumbered, or -1): the lowest original index wins."""
    r = carry[0]
    best = -np.inf
    last = -1
    for j in range(end_ok.shape[0]):
        v = rows[r, inv[j] + 1]
        if end_ok[j] and v > best:
            best = v
            last = j
    if last < 0:
        return best, -1
    return best, inv[last]


@njit(**_JIT)
def slot_block_path(
    codes, gain, ck, bk, known, nxt, rows, bps, out, ge, perm, lin, emadd, clsp, ptr, n0, dst,
    src, rank, col, tb_prev, tb_col, p_ptr, p_src,
):  # fmt: skip
    """Block ``bk`` recomputed from ``ck[bk]`` and traced into ``out`` (original states);
    ``known`` a renumbered state at the block's last position (>= 0), else the best
    predecessor of ``nxt`` (renumbered, at the next position)."""
    n1 = codes.shape[0]
    m = rows.shape[1] - 2
    _dummies(rows, m)
    for s in range(m + 2):
        rows[0, s] = ck[bk, s]
    src_r = 0
    for r in range(1, n1):
        dst_r = 1 - src_r
        _slot_step(
            rows, src_r, rows, dst_r, bps, r, codes[r], gain, r, ge, lin, emadd, clsp, ptr, n0,
            dst, src, rank, col,
        )  # fmt: skip
        src_r = dst_r
    state = known
    if state < 0:
        if tb_prev[nxt] >= 0:
            state = tb_prev[nxt]
        else:
            best = -np.inf
            pick = p_src[p_ptr[nxt]]
            for q in range(p_ptr[nxt], p_ptr[nxt + 1]):
                v = rows[src_r, p_src[q]]
                if v > best:
                    best = v
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
