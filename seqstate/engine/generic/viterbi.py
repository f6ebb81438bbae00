"""Viterbi kernels that stream: a forward pass over chunks of codes, block tracebacks.

The one Viterbi implementation of each family: this module (generic family), and
:mod:`seqstate.engine.small.viterbi`, :mod:`seqstate.engine.sparse.viterbi`, with the same
calls; :mod:`seqstate.engine.stream_paths` strings them together (whole record or
streaming).  The max-product steps (the families' own step helpers) are cut into calls:

* ``forward(codes, i0, ...)`` -- positions ``[i0, i0 + len(codes))`` of the record; the
  delta row of position ``i0 - 1`` is carried in ``rows`` (and ``carry``) from the previous
  call.  The row at every block start ``bk * block`` is stored in ``ck[bk]`` (the
  checkpoints), and from position ``tail0`` on the back-pointers of every position are kept
  in ``tail`` (row ``i - tail0 + 1``; row 0 takes the writes before ``tail0``), so that the
  last blocks need no second pass.  Returns -1, or the failing position.
* ``final(...)`` -- the best final state (lowest index among equals) and the path's log
  probability.
* ``block_path(codes, ck, bk, known, nxt, ...)`` -- recompute block ``bk`` from its
  checkpoint with its back-pointers and trace it back into ``out``; the state at the block's
  last position is ``known`` (>= 0), or the best predecessor of ``nxt``, the state at the
  position after the block (the step's own rule).
* ``tail_path(...)`` -- trace a block whose back-pointers are in ``tail``; returns the
  state at the position before the block.

State numbers are the family's own: original indices (generic), compact indices into the
position's emitting states (small), renumbered states (sparse); ``out`` always receives
original indices.  Coordinates are 0-based; scores are natural logs.  Ties: the lowest
predecessor index at every step, the lowest final state at the end.  No I/O, no printing;
work arrays come from the caller (:mod:`seqstate.engine.buffers`).
"""

from __future__ import annotations

import numpy as np
from numba import njit, uintp

from seqstate.engine._common import JIT as _JIT
from seqstate.engine.generic.kernels import _viterbi_step

_ONE = uintp(1)


@njit(**_JIT)
def _first_ck(i0, block):
    """The first block start at or after ``max(i0, 1)``."""
    j = i0 if i0 > 1 else 1
    return ((j + block - 1) // block) * block


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
def final(rows, carry, log_end):
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
def block_path(
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
def tail_path(b0, b1, tail0, tail, known, out):
    """Trace ``[b0, b1)`` through the kept back-pointers; returns the state at ``b0 - 1``."""
    state = known
    out[b1 - b0 - 1] = state
    for i in range(b1 - 1, b0, -1):
        state = tail[i - tail0 + 1, state]
        out[i - 1 - b0] = state
    if b0 == 0:
        return -1
    return tail[b0 - tail0 + 1, state]
