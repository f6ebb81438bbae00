"""MEA kernels of the generic family (original state numbers): the forward pass over a
window of codes and gain rows, the final state, and the block tracebacks that
:class:`seqstate.engine.mea.Stream` strings together.  See :mod:`seqstate.engine.mea` for
the path, the tie rule and the memory; the chain-sparse family's are in
:mod:`seqstate.engine.sparse.mea`.
"""

from __future__ import annotations

import math

from numba import njit, uintp

from seqstate.engine._common import JIT as _JIT

NEG = -math.inf


@njit(**_JIT)
def _mea_step(X, xr, Y, yr, B, br, c, G, gr, cls, emit, p_ptr, p_src, col):
    """One step X[xr] -> Y[yr] with gain row G[gr] (array and index: no row view); the
    winners' ranks of multi-predecessor states into B[br, col[j]].  The operations and tie
    rule of :func:`_step`: the best predecessor (strictly greater replaces, so the lowest
    index wins), then the gain of the state's class.
    Returns True when some state is reachable."""
    m = Y.shape[1]
    c = uintp(c)
    any_ok = False
    for j in range(m):
        if emit[c, j]:
            lo = uintp(p_ptr[j])
            hi = uintp(p_ptr[j + 1])
            if hi - lo == 1:
                v = X[xr, uintp(p_src[lo])]
                if v > NEG:
                    Y[yr, j] = v + G[gr, uintp(cls[j])]
                    any_ok = True
                else:
                    Y[yr, j] = NEG
            else:
                best = NEG
                arg = -1
                for q in range(lo, hi):
                    v = X[xr, uintp(p_src[q])]
                    if v > best:
                        best = v
                        arg = q - lo
                if arg >= 0:
                    Y[yr, j] = best + G[gr, uintp(cls[j])]
                    B[br, uintp(col[j])] = arg
                    any_ok = True
                else:
                    Y[yr, j] = NEG
        else:
            Y[yr, j] = NEG
    return any_ok


@njit(**_JIT)
def _pred(state, B, br, p_ptr, p_src, col):
    """The predecessor of ``state`` recorded in B[br] (one-predecessor states: their only one)."""
    lo = p_ptr[state]
    if p_ptr[state + 1] - lo == 1:
        return p_src[lo]
    return p_src[lo + B[br, col[state]]]


@njit(**_JIT)
def stream_forward(
    codes, gain, i0, block, tail0, rows, carry, ck, tail, cls, emit, start_ok, p_ptr, p_src, col
):
    """Forward over positions ``[i0, i0 + len(codes))`` (``gain`` their rows); ``rows`` (2, M)
    holds the score row of ``i0 - 1`` in row ``carry[0]`` (updated on return).  The row at
    every block start goes to ``ck``; from ``tail0`` on the ranks go to ``tail`` row
    ``i - tail0 + 1`` (row 0 takes the earlier writes).  Returns -1 or the first position
    no allowed path reaches."""
    n1 = codes.shape[0]
    m = rows.shape[1]
    src = carry[0]
    j0 = 0
    if i0 == 0:
        c = uintp(codes[0])
        any_ok = False
        for j in range(m):
            if start_ok[j] and emit[c, j]:
                rows[0, j] = gain[0, cls[j]]
                any_ok = True
            else:
                rows[0, j] = NEG
        if not any_ok:
            return 0
        for j in range(m):
            ck[0, j] = rows[0, j]
        src = 0
        j0 = 1
    first = i0 if i0 > 1 else 1
    ckpos = ((first + block - 1) // block) * block
    for r in range(j0, n1):
        i = i0 + r
        dst = 1 - src
        br = i - tail0 + 1 if i >= tail0 else 0
        if not _mea_step(rows, src, rows, dst, tail, br, codes[r], gain, r, cls, emit, p_ptr,
                         p_src, col):  # fmt: skip
            return i
        src = dst
        if i == ckpos:
            bk = i // block
            for j in range(m):
                ck[bk, j] = rows[dst, j]
            ckpos += block
    carry[0] = src
    return -1


@njit(**_JIT)
def stream_final(rows, carry, end_ok):
    """(total gain, best final state or -1): the lowest index among equal totals."""
    src = carry[0]
    best = NEG
    last = -1
    for j in range(rows.shape[1]):
        if end_ok[j] and rows[src, j] > best:
            best = rows[src, j]
            last = j
    return best, last


@njit(**_JIT)
def stream_block_path(
    codes, gain, ck, bk, known, nxt, rows, bps, out, cls, emit, p_ptr, p_src, col
):
    """Block ``bk`` (``codes``/``gain`` its positions) recomputed from ``ck[bk]`` and traced
    into ``out``: the state at its last position is ``known`` (>= 0) or the best predecessor
    of ``nxt``, the state at the position after the block."""
    n1 = codes.shape[0]
    m = rows.shape[1]
    for j in range(m):
        rows[0, j] = ck[bk, j]
    src = 0
    for r in range(1, n1):
        dst = 1 - src
        _mea_step(rows, src, rows, dst, bps, r, codes[r], gain, r, cls, emit, p_ptr, p_src, col)
        src = dst
    state = known
    if state < 0:
        lo = p_ptr[nxt]
        state = p_src[lo]
        best = NEG
        for q in range(lo, p_ptr[nxt + 1]):
            v = rows[src, p_src[q]]
            if v > best:
                best = v
                state = p_src[q]
    out[n1 - 1] = state
    for r in range(n1 - 1, 0, -1):
        state = _pred(state, bps, r, p_ptr, p_src, col)
        out[r - 1] = state


@njit(**_JIT)
def stream_tail_path(b0, b1, tail0, tail, known, out, p_ptr, p_src, col):
    """Trace ``[b0, b1)`` through the kept ranks; returns the state at ``b0 - 1`` (-1 at 0)."""
    state = known
    out[b1 - b0 - 1] = state
    for i in range(b1 - 1, b0, -1):
        state = _pred(state, tail, i - tail0 + 1, p_ptr, p_src, col)
        out[i - 1 - b0] = state
    if b0 == 0:
        return -1
    return _pred(state, tail, b0 - tail0 + 1, p_ptr, p_src, col)
