"""The posterior kernels of the chain-sparse family, in chunks of codes: the only
implementation of its forward, backward and posterior passes (driven by
:mod:`seqstate.engine.passes`).

Same split as :mod:`seqstate.engine.generic.posterior`, in the renumbered slots of
:mod:`seqstate.engine.sparse` (state ``t`` in slot ``t + 1``, dummy slots 0 and M + 1
holding 0), with its rescaling rule (largest entry below the threshold, powers of two,
an integer binary exponent).  Checkpoints are written in the original state order
(``alpha_ck[bk, perm[s]] = slot s + 1``), as the whole-record kernel writes them, and
read back the same way, so the values are bit-identical.

Coordinates are 0-based record positions; kernels return the first failing position
or -1.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from seqstate.engine._common import JIT as _JIT
from seqstate.engine._common import LN2 as _LN2
from seqstate.engine._common import RESCALE_BELOW
from seqstate.engine.buffers import work_buffer
from seqstate.engine.sparse.tables import _bits_of, _dot, _first, _maxbits, _rescale, _step

__all__ = ["backward_chunk", "backward_init", "forward_chunk", "forward_final", "span"]


#: Blocks longer than this are swept in sub-blocks of :data:`SPAN_ROWS` rows by :func:`span`.
#: A block of rows is block x M doubles (101 MB per thread for 798 states on a 250 Mbp
#: record, whose blocks are 15,812 bases); sub-blocks of 64 rows (400 kB) stay in the
#: caches at the cost of stepping each block's backward vectors twice.  Measured on 1 Mbp of
#: A. thaliana with the 798-state plant model (posterior, best of 3, CPU seconds; shared
#: 2-core machine, 2026-12-04): 5,478-base blocks 2.49 / 2.88 s in one sweep, 2.31 / 2.63 s
#: in sub-blocks; 1,000-base blocks 2.23 / 2.01 s in one sweep, 2.73 / 2.33 s in sub-blocks.
SPAN_SWEEP_MAX = 4096
SPAN_ROWS = 64


def span_scratch(m: int, block: int, n_groups: int) -> tuple[np.ndarray, ...]:
    """Work arrays ``(buf, fwd, sums, tops)`` of :func:`span` (M = ``m`` states)."""
    rows = block if block <= SPAN_SWEEP_MAX else SPAN_ROWS
    tops = work_buffer(((block + rows - 1) // rows, m + 2))
    buf = work_buffer((max(rows, 2), m + 2))
    return buf, work_buffer((2, m + 2)), work_buffer(n_groups + 1), tops


@njit(**_JIT)
def _keep(ck, ck_log, bk, rows, r, perm, ex):
    """Checkpoint ``bk`` in the original state order: slot row ``r`` of ``rows`` and its
    binary exponent ``ex`` (kept as a natural log)."""
    for s in range(perm.shape[0]):
        ck[bk, perm[s]] = rows[r, s + 1]
    ck_log[bk] = ex * _LN2


@njit(**_JIT)
def forward_chunk(
    codes,
    i0,
    rows,
    ic,
    block,
    alpha_ck,
    alpha_ck_log,
    start,
    E,
    perm,
    w1,
    f_ptr,
    f_n0,
    f_dst,
    f_src,
    f_w,
    lim=RESCALE_BELOW,
):
    """Forward recursion over positions ``[i0, i0 + len(codes))``.

    ``rows`` (2, M + 2) holds the running vector in slots, row ``ic[0]``; ``ic[1]`` is
    its binary exponent (both updated, initialised at position 0; the dummy slots
    must hold 0).  Returns the failing position or -1.
    """
    n = codes.shape[0]
    m = start.shape[0]
    tmpi = np.zeros(1, dtype=np.int64)
    tmpf = tmpi.view(np.float64)
    limbits = _bits_of(lim, tmpi, tmpf)
    ri = rows.view(np.int64)
    fsrc = ic[0]
    ex = ic[1]
    fail = -1
    nxt = ((i0 + block - 1) // block) * block  # the next block start at or after i0
    for j in range(n):
        i = i0 + j
        if i == 0:
            ex = 0
            _first(rows, 0, codes[0], m, start, E)
            fsrc = 0
        else:
            fdst = 1 - fsrc
            _step(rows, fsrc, rows, fdst, codes[j], m, 0, w1, f_ptr, f_n0, f_dst, f_src, f_w)
            fsrc = fdst
        mx = _maxbits(ri, fsrc, 1, m + 1)
        if mx < limbits:
            if mx == 0:
                fail = i
                break
            ex += _rescale(rows, fsrc, 1, m + 1, mx, tmpi, tmpf)
        if i == nxt:
            _keep(alpha_ck, alpha_ck_log, i // block, rows, fsrc, perm, ex)
            nxt += block
    ic[0] = fsrc
    ic[1] = ex
    return fail


@njit(**_JIT)
def forward_final(rows, ic, end):
    """(log-likelihood, ok) from the carried vector at the last position (natural log)."""
    m = end.shape[0]
    src = ic[0]
    final = 0.0
    for s in range(m):
        final += rows[src, s + 1] * end[s]
    if final == 0.0:
        return -np.inf, False
    return math.log(final) + ic[1] * _LN2, True


@njit(**_JIT)
def backward_init(rows, ic, end, perm, beta_ck, beta_ck_log, lim=RESCALE_BELOW):
    """The backward vector at the last position from the end factors, checkpointed in the
    record's last block.  Returns False when no state may end the record."""
    m = end.shape[0]
    tmpi = np.zeros(1, dtype=np.int64)
    tmpf = tmpi.view(np.float64)
    limbits = _bits_of(lim, tmpi, tmpf)
    ri = rows.view(np.int64)
    for r in range(2):
        rows[r, 0] = 0.0
        rows[r, m + 1] = 0.0
    for s in range(m):
        rows[0, s + 1] = end[s]
    ex = 0
    mx = _maxbits(ri, 0, 1, m + 1)
    if mx < limbits:
        if mx == 0:
            return False
        ex += _rescale(rows, 0, 1, m + 1, mx, tmpi, tmpf)
    last = beta_ck.shape[0] - 1
    for s in range(m):
        beta_ck[last, perm[s]] = rows[0, s + 1]
    beta_ck_log[last] = ex * _LN2
    ic[0] = 0
    ic[1] = ex
    return True


@njit(**_JIT)
def backward_chunk(
    codes,
    a,
    p,
    rows,
    ic,
    block,
    beta_ck,
    beta_ck_log,
    perm,
    v1,
    b_ptr,
    b_n0,
    b_dst,
    b_src,
    b_w,
    lim=RESCALE_BELOW,
):
    """Backward recursion from position ``p`` down to ``max(a - 1, 0)``; ``codes`` are
    those of positions ``[a, p + 1)`` (the step at ``i`` reads the code at ``i + 1``).

    ``rows[ic[0]]`` is the vector at ``p`` in slots and ``ic[1]`` its binary exponent
    (updated).  Returns the failing position or -1.
    """
    m = perm.shape[0]
    tmpi = np.zeros(1, dtype=np.int64)
    tmpf = tmpi.view(np.float64)
    limbits = _bits_of(lim, tmpi, tmpf)
    ri = rows.view(np.int64)
    src = ic[0]
    ex = ic[1]
    lo = a - 1 if a > 0 else 0
    fail = -1
    ckpos = (p // block) * block  # the next (going down) block start at or below p
    for i in range(p - 1, lo - 1, -1):
        dst = 1 - src
        _step(rows, src, rows, dst, codes[i + 1 - a], m, 2, v1, b_ptr, b_n0, b_dst, b_src, b_w)
        src = dst
        mx = _maxbits(ri, dst, 1, m + 1)
        if mx < limbits:
            if mx == 0:
                fail = i + 1
                break
            ex += _rescale(rows, dst, 1, m + 1, mx, tmpi, tmpf)
        if i + 1 == ckpos:
            _keep(beta_ck, beta_ck_log, i // block, rows, dst, perm, ex)
            ckpos -= block
    ic[0] = src
    ic[1] = ex
    return fail


@njit(**_JIT)
def span(
    codes,
    base,
    n,
    first_block,
    stop_block,
    block,
    perm,
    w1,
    f_ptr,
    f_n0,
    f_dst,
    f_src,
    f_w,
    v1,
    b_ptr,
    b_n0,
    b_dst,
    b_src,
    b_w,
    runs,
    n_groups,
    out,
    alpha_ck,
    beta_ck,
    buf,
    fwd,
    sums,
    tops,
    lim,
    fill,
    start,
    E,
    alpha_ck_log,
    ic,
):
    """Posteriors of blocks ``[first_block, stop_block)`` into ``out``.

    ``codes[j]`` is the code of record position ``base + j`` and ``out[j]`` its row; ``n``
    is the record length; ``runs`` from :func:`seqstate.engine.sparse.group_runs`.  Each
    block starts from its checkpoints.  ``buf``, ``fwd``, ``sums``, ``tops``: work arrays
    (:func:`span_scratch`).  The backward vectors of a block are stepped down from its
    checkpoint once, keeping the vector at the last position of each sub-block of
    ``buf.shape[0]`` rows (or of the whole block) in ``tops``, and again per sub-block from
    its top into ``buf``; the steps and rescalings are those of one pass, so every row is
    the same to the bit.  ``fill``: the forward checkpoints are made here, as
    :func:`seqstate.engine.generic.posterior.span` does (:func:`forward_chunk` reaches each
    block's first position from ``fwd[ic[0]]``, binary exponent ``ic[1]``; then
    :func:`forward_final` gives the log-likelihood).  Returns the failing position or -1.
    """
    m = perm.shape[0]
    ng = n_groups
    tmpi = np.zeros(1, dtype=np.int64)
    tmpf = tmpi.view(np.float64)
    limbits = _bits_of(lim, tmpi, tmpf)
    bufi = buf.view(np.int64)
    fi = fwd.view(np.int64)
    for r in range(buf.shape[0]):
        buf[r, 0] = 0.0
        buf[r, m + 1] = 0.0
    for r in range(tops.shape[0]):
        tops[r, 0] = 0.0
        tops[r, m + 1] = 0.0
    sub = buf.shape[0] if buf.shape[0] < block else block
    for r in range(2):
        fwd[r, 0] = 0.0
        fwd[r, m + 1] = 0.0
    ex = 0
    for bk in range(first_block, stop_block):
        b0 = bk * block
        b1 = min(n, b0 + block)
        if fill:
            pos = forward_chunk(
                codes[b0 - base : b0 - base + 1], b0, fwd, ic, block, alpha_ck, alpha_ck_log,
                start, E, perm, w1, f_ptr, f_n0, f_dst, f_src, f_w, lim,
            )  # fmt: skip
            if pos >= 0:
                return pos
            ex = ic[1]
        # sweep 1: the block's backward vectors, keeping each sub-block's top in `tops`
        src = 0
        for s in range(m):
            buf[0, s + 1] = beta_ck[bk, perm[s]]
        for i in range(b1 - 1, b0 + sub - 1, -1):
            k = (i - b0) // sub
            if i == b1 - 1 or i == b0 + (k + 1) * sub - 1:
                for s in range(m + 2):
                    tops[k, s] = buf[src, s]
            dst = 1 - src
            _step(buf, src, buf, dst, codes[i - base], m, 2, v1, b_ptr, b_n0, b_dst, b_src, b_w)
            src = dst
            mx = _maxbits(bufi, src, 1, m + 1)
            if mx < limbits and mx > 0:
                _rescale(buf, src, 1, m + 1, mx, tmpi, tmpf)  # a row's scale is irrelevant
        for s in range(m + 2):  # the vector at sub-block 0's top: min(b1, b0 + sub) - 1
            tops[0, s] = buf[src, s]
        fsrc = 0
        for s in range(m):
            fwd[0, s + 1] = alpha_ck[bk, perm[s]]
        s0 = b0
        for i in range(b0, b1):
            k = (i - b0) // sub
            if i == b0 + k * sub:
                # sweep 2: the rows of sub-block k, stepped down from its top
                s0 = i
                s1 = min(b1, s0 + sub)
                r = s1 - 1 - s0
                for s in range(m + 2):
                    buf[r, s] = tops[k, s]
                for j in range(s1 - 2, s0 - 1, -1):
                    r = j - s0
                    _step(
                        buf, r + 1, buf, r, codes[j + 1 - base], m, 2, v1, b_ptr, b_n0, b_dst,
                        b_src, b_w,
                    )  # fmt: skip
                    mx = _maxbits(bufi, r, 1, m + 1)
                    if mx < limbits and mx > 0:
                        _rescale(buf, r, 1, m + 1, mx, tmpi, tmpf)
            if i > b0:
                fdst = 1 - fsrc
                _step(
                    fwd, fsrc, fwd, fdst, codes[i - base], m, 0, w1, f_ptr, f_n0, f_dst, f_src, f_w
                )
                fsrc = fdst
                mx = _maxbits(fi, fsrc, 1, m + 1)
                if mx < limbits:
                    if mx == 0:
                        return i
                    ex += _rescale(fwd, fsrc, 1, m + 1, mx, tmpi, tmpf)
            r = i - s0
            for k in range(ng + 1):
                sums[k] = 0.0
            for j in range(runs.shape[0]):
                sums[runs[j, 2]] += _dot(fwd, fsrc, buf, r, runs[j, 0], runs[j, 1])
            norm = 0.0
            for k in range(ng + 1):
                norm += sums[k]
            if norm == 0.0:
                return i
            inv = 1.0 / norm
            row = i - base
            for k in range(ng):
                out[row, k] = sums[k] * inv
        if fill:
            ic[0] = fsrc
            ic[1] = ex
    return -1
