"""Viterbi and the segment queries of :mod:`seqstate.engine.sparse` (chain-sparse models).

Tables and conventions: see :mod:`seqstate.engine.sparse`.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit, uintp

from seqstate.engine._common import JIT as _JIT
from seqstate.engine._common import LN2 as _LN2
from seqstate.engine.sparse.tables import (
    _ONE,
    _bits_of,
    _dot_scaled,
    _first,
    _maxbits,
    _rescale,
    _step,
)


# ----------------------------------------------------------------- Viterbi
@njit(**_JIT)
def _vit(R, xr, S, yr, B, br, c, m, la1, logE, ptr, n0, dst, src, lp, rank, col):
    """One max-product step R[xr] -> S[yr]; back-pointer ranks of the multi states into B[br].

    A fix state's best predecessor value is built in its own slot (first
    predecessor assigned, later ones replace it only when strictly greater), then
    its log emission factor is added: the generic kernel's operations, in order.
    """
    c = uintp(c)
    for t in range(m):
        S[yr, t + 1] = (R[xr, t] + la1[t]) + logE[c, t]
    lo = uintp(ptr[c])
    mid = lo + uintp(n0[c])
    hi = uintp(ptr[c + _ONE])
    for q in range(lo, mid):
        S[yr, uintp(dst[q])] = R[xr, uintp(src[q])] + lp[q]
        B[br, uintp(col[q])] = 0
    for q in range(mid, hi):
        d = uintp(dst[q])
        v = R[xr, uintp(src[q])] + lp[q]
        if v > S[yr, d]:
            S[yr, d] = v
            B[br, uintp(col[q])] = rank[q]
    for q in range(lo, mid):
        d = uintp(dst[q])
        S[yr, d] = S[yr, d] + logE[c, d - _ONE]


@njit(**_JIT)
def _all_impossible(R, r, m):
    for s in range(1, m + 1):
        if R[r, s] > -np.inf:
            return False
    return True


# ----------------------------------------------------------------- segment queries
# Forward and backward vectors recomputed from the posterior's checkpoints, and
# forward passes restricted to a set of states, in the renumbered slots.  The
# vectors are rescaled as in the kernels above (by powers of two, when the largest
# entry falls below the threshold), so their values times 2**exponent equal the
# unscaled probabilities to rounding, whatever the scaling history.
@njit(**_JIT)
def to_slots(vec, perm, R, r):
    """R[r, t + 1] = vec[perm[t]] (original order -> slots); the dummy slots get 0."""
    m = perm.shape[0]
    R[r, 0] = 0.0
    R[r, m + 1] = 0.0
    for t in range(m):
        R[r, t + 1] = vec[perm[t]]


@njit(**_JIT)
def from_slots(R, r, perm, out):
    """out[perm[t]] = R[r, t + 1] (slots -> original order)."""
    for t in range(perm.shape[0]):
        out[perm[t]] = R[r, t + 1]


@njit(**_JIT)
def _finish(R, src, m):
    if src != 0:
        for s in range(m + 2):
            R[0, s] = R[src, s]


@njit(**_JIT)
def forward_advance(codes, i0, i1, R, w1, f_ptr, f_n0, f_dst, f_src, f_w, lim):
    """Row 0 of ``R`` (2, M + 2) holds the scaled forward vector at ``i0``; step it to ``i1``.

    Returns the binary exponent taken out on the way (the log scale grows by
    that times log 2).  Row 1 is scratch.
    """
    m = R.shape[1] - 2
    ri = R.view(np.int64)
    tmpi = np.zeros(1, dtype=np.int64)
    tmpf = tmpi.view(np.float64)
    limbits = _bits_of(lim, tmpi, tmpf)
    src = 0
    ex = 0
    for i in range(i0 + 1, i1 + 1):
        dst = 1 - src
        _step(R, src, R, dst, codes[i], m, 0, w1, f_ptr, f_n0, f_dst, f_src, f_w)
        src = dst
        mx = _maxbits(ri, src, 1, m + 1)
        if mx < limbits and mx > 0:
            ex += _rescale(R, src, 1, m + 1, mx, tmpi, tmpf)
    _finish(R, src, m)
    return ex


@njit(**_JIT)
def backward_advance(codes, i0, i1, R, v1, b_ptr, b_n0, b_dst, b_src, b_w, lim):
    """Row 0 of ``R`` holds the scaled backward vector at ``i0``; step it back to ``i1 <= i0``.

    Returns the binary exponent taken out, as :func:`forward_advance`.
    """
    m = R.shape[1] - 2
    ri = R.view(np.int64)
    tmpi = np.zeros(1, dtype=np.int64)
    tmpf = tmpi.view(np.float64)
    limbits = _bits_of(lim, tmpi, tmpf)
    src = 0
    ex = 0
    for i in range(i0 - 1, i1 - 1, -1):
        dst = 1 - src
        _step(R, src, R, dst, codes[i + 1], m, 2, v1, b_ptr, b_n0, b_dst, b_src, b_w)
        src = dst
        mx = _maxbits(ri, src, 1, m + 1)
        if mx < limbits and mx > 0:
            ex += _rescale(R, src, 1, m + 1, mx, tmpi, tmpf)
    _finish(R, src, m)
    return ex


@njit(**_JIT)
def constrained_forward(
    codes,
    s0,
    e0,
    init,
    init_is_start,
    cls,
    maskf,
    code,
    start,
    E,
    w1,
    f_ptr,
    f_n0,
    f_dst,
    f_src,
    f_w,
    lim,
    W,
):
    """Forward over positions s0..e0-1, position i through the states whose slot has
    ``maskf[cls[i - s0]]`` 1.

    ``cls`` (int64, e0 - s0 entries) is each position's class, ``maskf`` (K, M + 2)
    the 0/1 factors per slot of each class (0 in the dummy slots).  ``init`` is row
    0 of an (x, M + 2) array holding the unrestricted forward vector at ``s0 - 1``
    in slots (unused when ``init_is_start``: the start vector then).  ``code`` >= 0
    replaces every position's code (the unknown code, whose emission factors are
    all 1, gives the prior probability of a path through the allowed sets); -1
    reads ``codes``.  The final scaled vector lands in row 0 of ``W`` (2, M + 2),
    whose contents on entry are never read (its dummy slots are set to 0 first).
    Returns its binary exponent as a float, or -inf if no allowed path exists.
    """
    m = W.shape[1] - 2
    wi = W.view(np.int64)
    tmpi = np.zeros(1, dtype=np.int64)
    tmpf = tmpi.view(np.float64)
    limbits = _bits_of(lim, tmpi, tmpf)
    # the steps read the dummy slots of both rows: they must hold 0 whatever W held
    for r in range(2):
        W[r, 0] = 0.0
        W[r, m + 1] = 0.0
    ex = 0
    src = 0
    for i in range(s0, e0):
        c = codes[i] if code < 0 else code
        dst = 1 - src
        if i == s0:
            dst = 0
            if init_is_start:
                _first(W, 0, c, m, start, E)
            else:
                _step(init, 0, W, 0, c, m, 0, w1, f_ptr, f_n0, f_dst, f_src, f_w)
        else:
            _step(W, src, W, dst, c, m, 0, w1, f_ptr, f_n0, f_dst, f_src, f_w)
        k = cls[i - s0]
        for s in range(1, m + 1):
            W[dst, s] *= maskf[k, s]
        src = dst
        mx = _maxbits(wi, src, 1, m + 1)
        if mx == 0:
            return -np.inf
        if mx < limbits:
            ex += _rescale(W, src, 1, m + 1, mx, tmpi, tmpf)
    _finish(W, src, m)
    return float(ex)


@njit(**_JIT)
def log_dot(F, fr, B, br):
    """Natural log of sum_s F[fr, s] * B[br, s] (-inf when 0), each row first scaled so
    that its largest entry lies in [0.5, 1) (exact), so the products cannot underflow
    for want of scale.  Neither row is changed."""
    n = F.shape[1]
    mf = 0.0
    mb = 0.0
    for s in range(n):
        mf = max(mf, F[fr, s])
        mb = max(mb, B[br, s])
    if mf == 0.0 or mb == 0.0:
        return -np.inf
    _, ef = math.frexp(mf)
    _, eb = math.frexp(mb)
    sf = math.ldexp(1.0, -ef)
    sb = math.ldexp(1.0, -eb)
    d = _dot_scaled(F, fr, sf, B, br, sb, n)
    if d <= 0.0:
        return -np.inf
    return math.log(d) + (ef + eb) * _LN2
