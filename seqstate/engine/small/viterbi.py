"""Viterbi of the two-state-per-code family, in compact indices into each position's
emitting states: the calls of :mod:`seqstate.engine.generic.viterbi` (``forward``,
``final``, ``block_path``, ``tail_path``; same contract, same tie rule).
"""

from __future__ import annotations

import numpy as np
from numba import njit, uintp

from seqstate.engine._common import JIT as _JIT
from seqstate.engine.generic.viterbi import _first_ck
from seqstate.engine.small.tables import _wide_viterbi

_ONE = uintp(1)


@njit(**_JIT)
def forward(
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
def final(da, carry, K, st, log_end):
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
def block_path(
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
def tail_path(codes, b0, tail0, tail, known, st, out):
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
