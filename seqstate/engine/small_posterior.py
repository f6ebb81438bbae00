"""The posterior kernel of :mod:`seqstate.engine.small` (two emitting states per code).

Tables and conventions: see :mod:`seqstate.engine.small`.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from seqstate.engine._common import JIT as _JIT
from seqstate.engine._common import RESCALE_BELOW
from seqstate.engine.small import _full_backward, _wide_backward, _wide_forward


# ----------------------------------------------------------------- posterior
@njit(**_JIT)
def posterior_checkpointed(
    codes,
    start,
    end,
    K,
    st,
    wide,
    cls,
    W,
    T,
    E,
    block,
    gc,
    out,
    alpha_ck,
    alpha_ck_log,
    beta_ck,
    beta_ck_log,
    full,
    lim=RESCALE_BELOW,
):
    """Posteriors summed into ``out[i, gc[codes[i], j]]``; same contract as the generic kernel.

    ``gc`` comes from :func:`group_table`.  Pass 1 runs backward over the record
    and keeps the full backward vector at the last position of every block;
    pass 2 runs forward block by block, recomputes the block's compact backward
    vectors from its checkpoint and writes the posteriors, keeping the full
    forward vector at the first position of every block.  Working memory is
    O(block * K) plus the checkpoints; ``full`` is a work array of M entries.
    Returns (loglik, fail_position).
    """
    n = codes.shape[0]
    m = start.shape[0]
    kmax = st.shape[1]
    nblocks = (n + block - 1) // block
    ba = np.zeros(kmax)
    bb = np.zeros(kmax)
    # ---- pass 1: backward
    logscale = 0.0
    fs = 0.0
    for s in range(m):
        full[s] = end[s]
        fs += end[s]
    if fs < lim:
        if fs == 0.0:
            return -np.inf, n
        inv = 1.0 / fs
        for s in range(m):
            full[s] *= inv
        logscale += math.log(fs)
    beta_ck[nblocks - 1, :] = full
    beta_ck_log[nblocks - 1] = logscale
    c = codes[n - 1]
    for k in range(kmax):
        ba[k] = full[st[c, k]] if k < K[c] else 0.0
    b0v = ba[0]
    b1v = ba[1]
    cn = c
    ckpos = ((n - 1) // block) * block  # next (going down) block start below n - 1
    for i in range(n - 2, -1, -1):
        c = codes[i]
        if i + 1 == ckpos:
            ckpos -= block
            # checkpoint: the full backward vector at i, the compact one from it
            if not wide[cn]:
                ba[0] = b0v
                ba[1] = b1v
            fs = _full_backward(full, ba, cn, K, st, T, E)
            if fs < lim:
                if fs == 0.0:
                    return -np.inf, i + 1
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
                return -np.inf, i
            b0v = ba[0]
            b1v = ba[1]
        elif wide[cn] or wide[c]:
            if not wide[cn]:
                ba[0] = b0v
                ba[1] = b1v
            s = _wide_backward(bb, c, ba, cn, K, st, T, E)
            if s < lim:
                if s == 0.0:
                    return -np.inf, i + 1
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
                    return -np.inf, i + 1
                inv = 1.0 / s
                v0 *= inv
                v1 *= inv
                logscale += math.log(s)
            b0v = v0
            b1v = v1
        cn = c
    # ---- pass 2: forward, block by block
    buf = np.zeros((min(block, n), kmax))
    ua = np.zeros(kmax)
    va = np.zeros(kmax)
    u0 = 0.0
    u1 = 0.0
    flog = 0.0
    cp = codes[0]
    for bk in range(nblocks):
        b0 = bk * block
        b1 = min(n, b0 + block)
        # compact backward vectors of the block, from its checkpoint
        c = codes[b1 - 1]
        r = b1 - 1 - b0
        for k in range(kmax):
            buf[r, k] = beta_ck[bk, st[c, k]] if k < K[c] else 0.0
        x0 = buf[r, 0]
        x1 = buf[r, 1]
        cn = c
        for i in range(b1 - 2, b0 - 1, -1):
            c = codes[i]
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
        # forward through the block, writing posteriors
        for i in range(b0, b1):
            c = codes[i]
            r = i - b0
            if i == 0:
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
                        return -np.inf, 0
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
                        return -np.inf, i
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
                        return -np.inf, i
                    inv = 1.0 / s
                    v0 *= inv
                    v1 *= inv
                    flog += math.log(s)
                u0 = v0
                u1 = v1
            cp = c
            if i == b0:
                if not wide[c]:
                    ua[0] = u0
                    ua[1] = u1
                for s_ in range(m):
                    alpha_ck[bk, s_] = 0.0
                for k in range(K[c]):
                    alpha_ck[bk, st[c, k]] = ua[k]
                alpha_ck_log[bk] = flog
            if wide[c]:
                norm = 0.0
                for k in range(K[c]):
                    norm += ua[k] * buf[r, k]
                if norm == 0.0:
                    return -np.inf, i
                inv = 1.0 / norm
                for k in range(K[c]):
                    col = gc[c, k]
                    if col >= 0:
                        out[i, col] += ua[k] * buf[r, k] * inv
            else:
                g0 = u0 * buf[r, 0]
                g1 = u1 * buf[r, 1]
                norm = g0 + g1
                if norm == 0.0:
                    return -np.inf, i
                inv = 1.0 / norm
                col = gc[c, 0]
                if col >= 0:
                    out[i, col] += g0 * inv
                col = gc[c, 1]
                if col >= 0:
                    out[i, col] += g1 * inv
    if not wide[cp]:
        ua[0] = u0
        ua[1] = u1
    final = 0.0
    for k in range(K[cp]):
        final += ua[k] * end[st[cp, k]]
    if final == 0.0:
        return -np.inf, n
    return math.log(final) + flog, -1
