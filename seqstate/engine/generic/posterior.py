"""The posterior kernels of the generic family, in chunks of codes: the only implementation
of its forward, backward and posterior passes (whole-record and streaming alike, driven by
:mod:`seqstate.engine.passes`).

A posterior runs a backward pass (pass 1) keeping the backward vector at each block's
last position, then a forward pass (pass 2) that keeps the forward vector at each
block's first position and writes each block's posteriors from the running forward
vector and the block's backward vectors recomputed from its checkpoint.  Here:

* :func:`forward_chunk` -- pass 2's forward recursion over positions ``[i0, i0 + len)``,
  carrying the running vector, its log scale and the row index between calls, and
  storing the checkpoints of the blocks that start inside the chunk;
* :func:`backward_chunk` -- pass 1 over a chunk read from the end of the record;
* :func:`span` -- pass 2's posterior of whole blocks, each started from its two
  checkpoints (the forward vector AT the block's first position is exactly the running
  vector there, so the values are those of one whole-record sweep, bit for bit); in fill
  mode it is that sweep (pass 2 of the whole-record posterior).

The step helpers, their order of operations and the rescaling decisions are those of
:mod:`seqstate.engine.generic.kernels`.  Coordinates are 0-based record positions; chunks and
spans are half-open.  Kernels return the first failing position (0-based) or -1.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit, uintp

from seqstate.engine._common import JIT as _JIT
from seqstate.engine._common import RESCALE_BELOW
from seqstate.engine.buffers import work_buffer
from seqstate.engine.generic.kernels import (
    _ONE,
    _backward_gather,
    _backward_scatter,
    _first,
    _forward_step,
    _scale,
    _scatter_codes,
)

__all__ = ["backward_chunk", "forward_chunk", "scatter_table", "span", "span_scratch"]


def scatter_table(tables) -> np.ndarray:
    """Per code, whether the backward step scatters (as the whole-record kernel decides)."""
    return _scatter_codes(tables.nz_ptr, tables.nz_state, tables.pred_ptr, tables.pred_src.shape[0])


def span_scratch(m: int, block: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Work arrays ``(w, buf, gamma, fw)`` of :func:`span` (M = ``m`` states)."""
    return work_buffer(m), work_buffer((block, m)), work_buffer(m), work_buffer((2, m))


@njit(**_JIT)
def _keep(ck, ck_log, bk, rows, r, log_scale):
    """Checkpoint ``bk``: row ``r`` of ``rows`` and its natural-log scale."""
    for s in range(ck.shape[1]):
        ck[bk, s] = rows[r, s]
    ck_log[bk] = log_scale


@njit(**_JIT)
def forward_chunk(
    codes,
    i0,
    rows,
    carry,
    icarry,
    block,
    alpha_ck,
    alpha_ck_log,
    start,
    E,
    nz_ptr,
    nz_state,
    pred_ptr,
    pred_src,
    pred_p,
    lim=RESCALE_BELOW,
):
    """Forward recursion over positions ``[i0, i0 + len(codes))``.

    ``rows`` (2, M) holds the running scaled vector in row ``icarry[0]`` and
    ``carry[0]`` its natural-log scale (both updated); when ``i0 == 0`` they are
    initialised here.  At each position ``i`` with ``i % block == 0`` the vector and
    its scale go to ``alpha_ck[i // block]``, ``alpha_ck_log[i // block]``.
    Returns the first position where every state is impossible, or -1.
    """
    n = codes.shape[0]
    fsrc = icarry[0]
    flog = carry[0]
    nxt = ((i0 + block - 1) // block) * block  # the next block start at or after i0
    for j in range(n):
        i = i0 + j
        if i == 0:
            fsrc = 0
            flog = 0.0
            total = _first(start, rows, 0, codes[0], E, nz_ptr, nz_state)
        else:
            fdst = 1 - fsrc
            total = _forward_step(
                rows, fsrc, rows, fdst, codes[j], E, nz_ptr, nz_state, pred_ptr, pred_src, pred_p
            )
            fsrc = fdst
        if total < lim:
            if total == 0.0:
                icarry[0] = fsrc
                carry[0] = flog
                return i
            _scale(rows, fsrc, total)
            flog += math.log(total)
        if i == nxt:
            _keep(alpha_ck, alpha_ck_log, i // block, rows, fsrc, flog)
            nxt += block
    icarry[0] = fsrc
    carry[0] = flog
    return -1


@njit(**_JIT)
def forward_final(rows, icarry, carry, end):
    """(log-likelihood, ok) from the forward vector at the last position (natural log)."""
    m = end.shape[0]
    final = 0.0
    src = icarry[0]
    for s in range(m):
        final += rows[src, s] * end[s]
    if final == 0.0:
        return -np.inf, False
    return math.log(final) + carry[0], True


@njit(**_JIT)
def backward_init(rows, carry, icarry, end, lim=RESCALE_BELOW):
    """The backward vector at the last position (the end factors, rescaled as pass 1 does).

    Returns False when no state may end the record."""
    m = end.shape[0]
    bsum = 0.0
    for s in range(m):
        rows[0, s] = end[s]
        bsum += end[s]
    logscale = 0.0
    icarry[0] = 0
    carry[0] = 0.0
    if bsum < lim:
        if bsum == 0.0:
            return False
        _scale(rows, 0, bsum)
        logscale += math.log(bsum)
    carry[0] = logscale
    return True


@njit(**_JIT)
def backward_chunk(
    codes,
    a,
    p,
    rows,
    carry,
    icarry,
    block,
    beta_ck,
    beta_ck_log,
    scatter,
    E,
    nz_ptr,
    nz_state,
    pred_ptr,
    pred_src,
    pred_p,
    succ_ptr,
    succ_dst,
    succ_p,
    w,
    lim=RESCALE_BELOW,
):
    """Backward recursion from position ``p`` down to ``max(a - 1, 0)``.

    ``codes`` are the codes of positions ``[a, p + 1)``; ``rows[icarry[0]]`` holds the
    scaled backward vector at ``p`` and ``carry[0]`` its natural-log scale (both
    updated).  At each position ``i`` with ``(i + 1) % block == 0`` (a block's last
    position) the vector goes to ``beta_ck[i // block]``.  ``w``: M work entries.
    Returns the failing position (the one whose code made every state impossible) or -1.
    """
    src = icarry[0]
    logscale = carry[0]
    lo = a - 1 if a > 0 else 0
    ckpos = (p // block) * block  # the next (going down) block start at or below p
    for i in range(p - 1, lo - 1, -1):
        dst = 1 - src
        cn = codes[i + 1 - a]
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
                icarry[0] = dst
                carry[0] = logscale
                return i + 1
            _scale(rows, dst, bsum)
            logscale += math.log(bsum)
        src = dst
        if i + 1 == ckpos:
            _keep(beta_ck, beta_ck_log, i // block, rows, dst, logscale)
            ckpos -= block
    icarry[0] = src
    carry[0] = logscale
    return -1


@njit(**_JIT)
def span(
    codes,
    base,
    n,
    first_block,
    stop_block,
    block,
    E,
    nz_ptr,
    nz_state,
    pred_ptr,
    pred_src,
    pred_p,
    succ_ptr,
    succ_dst,
    succ_p,
    scatter,
    group,
    out,
    alpha_ck,
    beta_ck,
    w,
    buf,
    gamma,
    fw,
    lim,
    fill,
    start,
    alpha_ck_log,
    carry,
    icarry,
):
    """Posteriors of blocks ``[first_block, stop_block)`` into ``out`` (zero on entry).

    ``codes[j]`` is the code of record position ``base + j`` and ``out[j]`` its row;
    ``n`` is the record length.  Each block starts from ``alpha_ck[bk]`` (the forward
    vector at its first position) and ``beta_ck[bk]`` (the backward vector at its
    last one), and combines them.

    ``fill``: the forward checkpoints are not known yet (the whole-record posterior):
    each block's first position is reached by :func:`forward_chunk` from the running
    vector (``fw[icarry[0]]``, log scale ``carry[0]``, both carried on; ``start`` the
    start factors), which writes ``alpha_ck[bk]`` and ``alpha_ck_log[bk]``; after the
    last block, :func:`forward_final` gives the log-likelihood.  The forward vector at a
    block's first position is the running vector there, so both ways give the same
    values bit for bit.  Returns the failing position (0-based, record coordinates) or -1.
    """
    m = alpha_ck.shape[1]
    flog = 0.0
    for bk in range(first_block, stop_block):
        b0 = bk * block
        b1 = min(n, b0 + block)
        if fill:
            pos = forward_chunk(
                codes[b0 - base : b0 - base + 1], b0, fw, carry, icarry, block, alpha_ck,
                alpha_ck_log, start, E, nz_ptr, nz_state, pred_ptr, pred_src, pred_p, lim,
            )  # fmt: skip
            if pos >= 0:
                return pos
            flog = carry[0]
        for s in range(m):
            buf[b1 - 1 - b0, s] = beta_ck[bk, s]
        for i in range(b1 - 2, b0 - 1, -1):
            r = i - b0
            cn = codes[i + 1 - base]
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
        fsrc = 0
        for s in range(m):
            fw[0, s] = alpha_ck[bk, s]
        for i in range(b0, b1):
            if i > b0:
                fdst = 1 - fsrc
                total = _forward_step(
                    fw,
                    fsrc,
                    fw,
                    fdst,
                    codes[i - base],
                    E,
                    nz_ptr,
                    nz_state,
                    pred_ptr,
                    pred_src,
                    pred_p,
                )
                fsrc = fdst
                if total < lim:
                    if total == 0.0:
                        return i
                    _scale(fw, fsrc, total)
                    flog += math.log(total)
            r = i - b0
            norm = 0.0
            c = uintp(codes[i - base])
            k0 = uintp(nz_ptr[c])
            k1 = uintp(nz_ptr[c + _ONE])
            for k in range(k0, k1):
                s = uintp(nz_state[k])
                g = fw[fsrc, s] * buf[r, s]
                gamma[s] = g
                norm += g
            if norm == 0.0:
                return i
            inv = 1.0 / norm
            row = i - base
            for k in range(k0, k1):
                s = uintp(nz_state[k])
                col = group[s]
                if col >= 0:
                    out[row, col] += gamma[s] * inv
        if fill:
            icarry[0] = fsrc
            carry[0] = flog
    return -1
