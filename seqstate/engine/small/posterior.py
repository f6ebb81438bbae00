"""The posterior kernels of the two-state-per-code family, in chunks of codes: the only
implementation of its forward, backward and posterior passes (driven by
:mod:`seqstate.engine.passes`).

Same split as :mod:`seqstate.engine.generic.posterior` (forward pass, backward pass read
from the end, per-block posteriors from the checkpoints), on the compact tables of
:mod:`seqstate.engine.small`; the checkpoints, the log-likelihood and the posteriors do
not depend on the chunks (bit for bit).

Carried between chunks: the compact vector (array ``ua`` or ``ba`` plus the two scalars
the narrow steps keep), its natural-log scale and the previous (forward) or next
(backward) code.  Coordinates are 0-based record positions; kernels return the first
failing position or -1.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from seqstate.engine._common import JIT as _JIT
from seqstate.engine.buffers import work_buffer
from seqstate.engine.small.tables import _full_backward, _wide_backward, _wide_forward

__all__ = ["backward_chunk", "forward_chunk", "forward_final", "span", "span_scratch"]


def span_scratch(kmax: int, block: int) -> tuple[np.ndarray, ...]:
    """Work arrays ``(buf, ba, bb, ua, va)`` of :func:`span`."""
    return (
        work_buffer((block, kmax)),
        work_buffer(kmax),
        work_buffer(kmax),
        work_buffer(kmax),
        work_buffer(kmax),
    )


@njit(**_JIT)
def forward_chunk(
    codes, i0, ua, va, fc, ic, block, alpha_ck, alpha_ck_log, start, K, st, wide, cls, W, T, E, lim
):
    """Forward recursion over positions ``[i0, i0 + len(codes))``.

    Carried: ``ua`` (compact vector), ``fc = [u0, u1, log scale]``, ``ic = [previous
    code]``; initialised here at position 0.  ``va``: kmax work entries.  The full
    vector at each block's first position goes to ``alpha_ck`` (original order).
    Returns the failing position or -1.
    """
    n = codes.shape[0]
    m = start.shape[0]
    kmax = st.shape[1]
    u0 = fc[0]
    u1 = fc[1]
    flog = fc[2]
    cp = ic[0]
    fail = -1
    nxt = ((i0 + block - 1) // block) * block  # the next block start at or after i0
    for j in range(n):
        i = i0 + j
        c = codes[j]
        if i == 0:
            flog = 0.0
            total = 0.0
            for k in range(kmax):
                if k < K[c]:
                    v = start[st[c, k]] * E[c, st[c, k]]
                else:
                    v = 0.0
                ua[k] = v
                total += v
            if total < lim:
                if total == 0.0:
                    fail = 0
                    break
                inv = 1.0 / total
                for k in range(kmax):
                    ua[k] *= inv
                flog += math.log(total)
            u0 = ua[0]
            u1 = ua[1]
        elif wide[cp] or wide[c]:
            if not wide[cp]:
                ua[0] = u0
                ua[1] = u1
            s = _wide_forward(ua, cp, va, c, K, st, T, E)
            if s < lim:
                if s == 0.0:
                    fail = i
                    break
                inv = 1.0 / s
                for k in range(kmax):
                    va[k] *= inv
                flog += math.log(s)
            for k in range(kmax):
                ua[k] = va[k]
            u0 = ua[0]
            u1 = ua[1]
        else:
            q = cls[cp]
            v0 = u0 * W[q, c, 0] + u1 * W[q, c, 2]
            v1 = u0 * W[q, c, 1] + u1 * W[q, c, 3]
            s = v0 + v1
            if s < lim:
                if s == 0.0:
                    fail = i
                    break
                inv = 1.0 / s
                v0 *= inv
                v1 *= inv
                flog += math.log(s)
            u0 = v0
            u1 = v1
        cp = c
        if i == nxt:
            bk = i // block
            nxt += block
            if not wide[c]:
                ua[0] = u0
                ua[1] = u1
            for s_ in range(m):
                alpha_ck[bk, s_] = 0.0
            for k in range(K[c]):
                alpha_ck[bk, st[c, k]] = ua[k]
            alpha_ck_log[bk] = flog
    fc[0] = u0
    fc[1] = u1
    fc[2] = flog
    ic[0] = cp
    return fail


@njit(**_JIT)
def forward_final(ua, fc, ic, K, st, wide, end):
    """(log-likelihood, ok) from the carried vector at the last position (natural log)."""
    cp = ic[0]
    if not wide[cp]:
        ua[0] = fc[0]
        ua[1] = fc[1]
    final = 0.0
    for k in range(K[cp]):
        final += ua[k] * end[st[cp, k]]
    if final == 0.0:
        return -np.inf, False
    return math.log(final) + fc[2], True


@njit(**_JIT)
def backward_chunk(
    codes,
    a,
    b,
    n,
    full,
    ba,
    bb,
    fc,
    ic,
    block,
    beta_ck,
    beta_ck_log,
    end,
    K,
    st,
    wide,
    cls,
    W,
    T,
    E,
    lim,
):
    """Backward recursion over the positions ``[a, b)`` (``codes``), read from the end.

    When ``b == n`` the vector at the last position is made from the end factors;
    otherwise it continues from the carried state: ``ba`` (compact vector at ``b``),
    ``fc = [b0v, b1v, log scale]``, ``ic = [code at b]``.  ``full`` (M) and ``bb`` are
    work arrays.  The full backward vector at each block's last position goes to
    ``beta_ck`` (original order).  Returns the failing position or -1.
    """
    m = full.shape[0]
    kmax = st.shape[1]
    nblocks = (n + block - 1) // block
    if b == n:
        logscale = 0.0
        fs = 0.0
        for s in range(m):
            full[s] = end[s]
            fs += end[s]
        if fs < lim:
            if fs == 0.0:
                return n
            inv = 1.0 / fs
            for s in range(m):
                full[s] *= inv
            logscale += math.log(fs)
        for s in range(m):
            beta_ck[nblocks - 1, s] = full[s]
        beta_ck_log[nblocks - 1] = logscale
        c = codes[n - 1 - a]
        for k in range(kmax):
            ba[k] = full[st[c, k]] if k < K[c] else 0.0
        b0v = ba[0]
        b1v = ba[1]
        cn = c
        top = n - 2
    else:
        b0v = fc[0]
        b1v = fc[1]
        logscale = fc[2]
        cn = ic[0]
        top = b - 1
    fail = -1
    ckpos = ((top + 1) // block) * block  # the next (going down) block start at or below top + 1
    for i in range(top, a - 1, -1):
        c = codes[i - a]
        if i + 1 == ckpos:
            ckpos -= block
            # checkpoint: the full backward vector at i, the compact one from it
            if not wide[cn]:
                ba[0] = b0v
                ba[1] = b1v
            fs = _full_backward(full, ba, cn, K, st, T, E)
            if fs < lim:
                if fs == 0.0:
                    fail = i + 1
                    break
                inv = 1.0 / fs
                for s in range(m):
                    full[s] *= inv
                logscale += math.log(fs)
            bk = (i + 1) // block - 1
            for s_ in range(m):
                beta_ck[bk, s_] = full[s_]
            beta_ck_log[bk] = logscale
            s = 0.0
            for k in range(kmax):
                if k < K[c]:
                    v = full[st[c, k]]
                    ba[k] = v
                    s += v
                else:
                    ba[k] = 0.0
            if s == 0.0:
                fail = i
                break
            b0v = ba[0]
            b1v = ba[1]
        elif wide[cn] or wide[c]:
            if not wide[cn]:
                ba[0] = b0v
                ba[1] = b1v
            s = _wide_backward(bb, c, ba, cn, K, st, T, E)
            if s < lim:
                if s == 0.0:
                    fail = i + 1
                    break
                inv = 1.0 / s
                for k in range(kmax):
                    bb[k] *= inv
                logscale += math.log(s)
            for k in range(kmax):
                ba[k] = bb[k]
            b0v = ba[0]
            b1v = ba[1]
        else:
            q = cls[c]
            v0 = W[q, cn, 0] * b0v + W[q, cn, 1] * b1v
            v1 = W[q, cn, 2] * b0v + W[q, cn, 3] * b1v
            s = v0 + v1
            if s < lim:
                if s == 0.0:
                    fail = i + 1
                    break
                inv = 1.0 / s
                v0 *= inv
                v1 *= inv
                logscale += math.log(s)
            b0v = v0
            b1v = v1
        cn = c
    fc[0] = b0v
    fc[1] = b1v
    fc[2] = logscale
    ic[0] = cn
    return fail


# The forward step is written out in forward_chunk and again in span (and the backward
# step in backward_chunk and span) on purpose: kept for speed.  Measured on the development
# machine (1 Mbp, cpg-island, median of 5): the step as one helper with
# @njit(inline="always") made the forward pass 60x slower (2.0 ms -> 120 ms; a plain @njit
# helper too); a helper for the rare wide step alone kept the forward pass at 2.0 ms but
# made the posterior 2x slower (15.9 -> 32.3 ms).
@njit(**_JIT)
def span(
    codes,
    base,
    n,
    first_block,
    stop_block,
    block,
    K,
    st,
    wide,
    cls,
    W,
    T,
    E,
    gc,
    out,
    alpha_ck,
    beta_ck,
    buf,
    ba,
    bb,
    ua,
    va,
    lim,
    fill,
    start,
    alpha_ck_log,
    fc,
    ic,
):
    """Posteriors of blocks ``[first_block, stop_block)`` into ``out`` (zero on entry).

    ``codes[j]`` is the code of record position ``base + j`` and ``out[j]`` its row; ``n``
    is the record length; ``gc`` from :func:`seqstate.engine.small.group_table`.  Each
    block starts from its checkpoints.  ``fill``: the forward checkpoints are made here,
    as :func:`seqstate.engine.generic.posterior.span` does (:func:`forward_chunk` reaches
    each block's first position from the carried state ``ua``, ``fc``, ``ic``; then
    :func:`forward_final` gives the log-likelihood).  Returns the failing position or -1.
    """
    kmax = st.shape[1]
    flog = 0.0
    for bk in range(first_block, stop_block):
        b0 = bk * block
        b1 = min(n, b0 + block)
        if fill:
            pos = forward_chunk(
                codes[b0 - base : b0 - base + 1], b0, ua, va, fc, ic, block, alpha_ck,
                alpha_ck_log, start, K, st, wide, cls, W, T, E, lim,
            )  # fmt: skip
            if pos >= 0:
                return pos
            flog = fc[2]
        # compact backward vectors of the block, from its checkpoint
        c = codes[b1 - 1 - base]
        r = b1 - 1 - b0
        for k in range(kmax):
            buf[r, k] = beta_ck[bk, st[c, k]] if k < K[c] else 0.0
        x0 = buf[r, 0]
        x1 = buf[r, 1]
        cn = c
        for i in range(b1 - 2, b0 - 1, -1):
            c = codes[i - base]
            r = i - b0
            if wide[cn] or wide[c]:
                for k in range(kmax):
                    ba[k] = buf[r + 1, k]
                s = _wide_backward(bb, c, ba, cn, K, st, T, E)
                if s < lim and s > 0.0:
                    inv = 1.0 / s
                    for k in range(kmax):
                        bb[k] *= inv
                for k in range(kmax):
                    buf[r, k] = bb[k]
                x0 = bb[0]
                x1 = bb[1]
            else:
                q = cls[c]
                v0 = W[q, cn, 0] * x0 + W[q, cn, 1] * x1
                v1 = W[q, cn, 2] * x0 + W[q, cn, 3] * x1
                s = v0 + v1
                if s < lim and s > 0.0:
                    inv = 1.0 / s
                    v0 *= inv
                    v1 *= inv
                buf[r, 0] = v0
                buf[r, 1] = v1
                x0 = v0
                x1 = v1
            cn = c
        # forward through the block from its checkpoint, writing posteriors
        c = codes[b0 - base]
        for k in range(kmax):
            ua[k] = alpha_ck[bk, st[c, k]] if k < K[c] else 0.0
        u0 = ua[0]
        u1 = ua[1]
        cp = c
        for i in range(b0, b1):
            c = codes[i - base]
            r = i - b0
            if i == b0:
                pass
            elif wide[cp] or wide[c]:
                if not wide[cp]:
                    ua[0] = u0
                    ua[1] = u1
                s = _wide_forward(ua, cp, va, c, K, st, T, E)
                if s < lim:
                    if s == 0.0:
                        return i
                    inv = 1.0 / s
                    for k in range(kmax):
                        va[k] *= inv
                    flog += math.log(s)
                for k in range(kmax):
                    ua[k] = va[k]
                u0 = ua[0]
                u1 = ua[1]
            else:
                q = cls[cp]
                v0 = u0 * W[q, c, 0] + u1 * W[q, c, 2]
                v1 = u0 * W[q, c, 1] + u1 * W[q, c, 3]
                s = v0 + v1
                if s < lim:
                    if s == 0.0:
                        return i
                    inv = 1.0 / s
                    v0 *= inv
                    v1 *= inv
                    flog += math.log(s)
                u0 = v0
                u1 = v1
            cp = c
            row = i - base
            if wide[c]:
                norm = 0.0
                for k in range(K[c]):
                    norm += ua[k] * buf[r, k]
                if norm == 0.0:
                    return i
                inv = 1.0 / norm
                for k in range(K[c]):
                    col = gc[c, k]
                    if col >= 0:
                        out[row, col] += ua[k] * buf[r, k] * inv
            else:
                g0 = u0 * buf[r, 0]
                g1 = u1 * buf[r, 1]
                norm = g0 + g1
                if norm == 0.0:
                    return i
                inv = 1.0 / norm
                col = gc[c, 0]
                if col >= 0:
                    out[row, col] += g0 * inv
                col = gc[c, 1]
                if col >= 0:
                    out[row, col] += g1 * inv
        if fill:
            fc[0] = u0
            fc[1] = u1
            fc[2] = flog
            ic[0] = cp
    return -1
