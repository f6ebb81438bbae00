"""Generic segment queries (numba): forward and backward vectors at a position, recomputed
from a posterior's checkpoints, and forward passes restricted to a set of states.

Tables, scaling and failure conventions are those of :mod:`seqstate.engine.kernels`.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit, uintp

from seqstate.engine._common import JIT as _JIT
from seqstate.engine._common import RESCALE_BELOW
from seqstate.engine.buffers import work_buffer
from seqstate.engine.kernels import (
    _ONE,
    _backward_gather,
    _backward_gather_wide,
    _forward_step,
    _forward_step_wide,
    _scale,
)

#: Models with at least this many states run the segment queries (:func:`vector_at`,
#: :func:`backward_vector_at`, :func:`restricted_forward`) through steps that visit
#: every state and sum by interleaved partial sums: the same recursions, another
#: summation order, no long chain of dependent additions.
RESTRICTED_MASKED_MIN = 32


def restricted_scratch(m: int, nnz: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Work arrays ``(ms, fsrc, fp)`` of :func:`restricted_forward` (``nnz`` allowed moves);
    empty below :data:`RESTRICTED_MASKED_MIN` states, where they are not used."""
    if m < RESTRICTED_MASKED_MIN:
        m = nnz = 0
    return work_buffer(m, np.int64), work_buffer(nnz, np.int64), work_buffer(nnz)


# ----------------------------------------------------------------- segments
@njit(**_JIT)
def vector_at(
    codes,
    pos,
    start,
    E,
    nz_ptr,
    nz_state,
    pred_ptr,
    pred_src,
    pred_p,
    block,
    alpha_ck,
    alpha_ck_log,
    out,
):
    """Forward vector at ``pos`` recomputed from the nearest checkpoint; returns its log scale.

    ``out * exp(returned log scale)`` is the unscaled forward probability
    P(x_0..x_pos, z_pos = s).
    """
    m = start.shape[0]
    bk = pos // block
    rows = np.zeros((2, m))
    for s in range(m):
        rows[0, s] = alpha_ck[bk, s]
    logscale = alpha_ck_log[bk]
    src = 0
    wide = m >= RESTRICTED_MASKED_MIN
    for i in range(bk * block + 1, pos + 1):
        dst = 1 - src
        if wide:
            total = _forward_step_wide(
                rows, src, rows, dst, codes[i], E, pred_ptr, pred_src, pred_p
            )
        else:
            total = _forward_step(
                rows, src, rows, dst, codes[i], E, nz_ptr, nz_state, pred_ptr, pred_src, pred_p
            )
        if total < RESCALE_BELOW and total > 0.0:
            _scale(rows, dst, total)
            logscale += math.log(total)
        src = dst
    for s in range(m):
        out[s] = rows[src, s]
    return logscale


@njit(**_JIT)
def backward_vector_at(
    codes, pos, E, nz_ptr, nz_state, succ_ptr, succ_dst, succ_p, block, beta_ck, beta_ck_log, out, w
):
    """Backward vector at ``pos`` recomputed from its block's checkpoint; returns its log scale.

    ``w`` is a work array of M entries.
    """
    n = codes.shape[0]
    m = out.shape[0]
    bk = pos // block
    b1 = min(n, bk * block + block)
    rows = np.zeros((2, m))
    for s in range(m):
        rows[0, s] = beta_ck[bk, s]
    logscale = beta_ck_log[bk]
    src = 0
    wide = m >= RESTRICTED_MASKED_MIN
    for i in range(b1 - 2, pos - 1, -1):
        dst = 1 - src
        if wide:
            total = _backward_gather_wide(
                rows, src, rows, dst, codes[i + 1], E, succ_ptr, succ_dst, succ_p, w
            )
        else:
            total = _backward_gather(
                rows,
                src,
                rows,
                dst,
                codes[i + 1],
                E,
                nz_ptr,
                nz_state,
                succ_ptr,
                succ_dst,
                succ_p,
                w,
            )
        if total < RESCALE_BELOW and total > 0.0:
            _scale(rows, dst, total)
            logscale += math.log(total)
        src = dst
    for s in range(m):
        out[s] = rows[src, s]
    return logscale


@njit(**_JIT)
def _restricted_masked(
    codes,
    s0,
    e0,
    init,
    init_is_start,
    mask,
    use_emissions,
    E,
    pred_ptr,
    pred_src,
    pred_p,
    out,
    ms,
    fsrc,
    fp,
):
    """:func:`restricted_forward` for large models: the same values up to rounding.

    The masked states and, for each, its masked predecessors are listed once per
    call (an unmasked predecessor holds 0 after the first position, so leaving it
    out adds nothing).  Every masked state is written at every position (0 where
    it cannot emit), so no row is reset, and the rescaling total is summed by
    four interleaved partial sums rather than one running sum.  Work arrays: ``ms``
    (int64, M entries), ``fsrc`` (int64) and ``fp`` (float64), both as long as
    ``pred_src``; only their first entries are used.
    """
    m = init.shape[0]
    nm = 0
    for t in range(m):
        if mask[t]:
            nm += 1
    fptr = np.zeros(nm + 1, dtype=np.int64)
    j = 0
    for t in range(m):
        if mask[t]:
            ms[j] = t
            cnt = 0
            for q in range(pred_ptr[t], pred_ptr[t + 1]):
                if mask[pred_src[q]]:
                    cnt += 1
            fptr[j + 1] = fptr[j] + cnt
            j += 1
    for j in range(nm):
        t = ms[j]
        k = fptr[j]
        for q in range(pred_ptr[t], pred_ptr[t + 1]):
            if mask[pred_src[q]]:
                fsrc[k] = pred_src[q]
                fp[k] = pred_p[q]
                k += 1
    a = np.zeros(m)
    b = np.zeros(m)
    logscale = 0.0
    for i in range(s0, e0):
        c = uintp(codes[i])
        if i == s0:
            for j in range(nm):
                t = uintp(ms[j])
                if init_is_start:
                    acc = init[t]
                else:
                    acc = 0.0
                    for q in range(uintp(pred_ptr[t]), uintp(pred_ptr[t + _ONE])):
                        acc += init[uintp(pred_src[q])] * pred_p[q]
                b[t] = acc * E[c, t] if use_emissions else acc
        elif use_emissions:
            for j in range(nm):
                t = uintp(ms[j])
                acc = 0.0
                for q in range(uintp(fptr[j]), uintp(fptr[j + 1])):
                    acc += a[uintp(fsrc[q])] * fp[q]
                b[t] = acc * E[c, t]
        else:
            for j in range(nm):
                acc = 0.0
                for q in range(uintp(fptr[j]), uintp(fptr[j + 1])):
                    acc += a[uintp(fsrc[q])] * fp[q]
                b[uintp(ms[j])] = acc
        t0 = t1 = t2 = t3 = 0.0
        j = 0
        while j + 4 <= nm:
            t0 += b[uintp(ms[j])]
            t1 += b[uintp(ms[j + 1])]
            t2 += b[uintp(ms[j + 2])]
            t3 += b[uintp(ms[j + 3])]
            j += 4
        while j < nm:
            t0 += b[uintp(ms[j])]
            j += 1
        total = (t0 + t1) + (t2 + t3)
        if total == 0.0:
            out[:] = 0.0
            return -np.inf
        if total < RESCALE_BELOW:
            inv = 1.0 / total
            for j in range(nm):
                b[uintp(ms[j])] *= inv
            logscale += math.log(total)
        a, b = b, a
    out[:] = a
    return logscale


def restricted_forward(
    codes: np.ndarray,
    s0: int,
    e0: int,
    init: np.ndarray,
    init_is_start: bool,
    mask: np.ndarray,
    use_emissions: bool,
    E: np.ndarray,
    nz_ptr: np.ndarray,
    nz_state: np.ndarray,
    pred_ptr: np.ndarray,
    pred_src: np.ndarray,
    pred_p: np.ndarray,
    out: np.ndarray,
    ms: np.ndarray,
    fsrc: np.ndarray,
    fp: np.ndarray,
) -> float:
    """Forward over positions s0..e0-1 through the states with ``mask[s]`` only.

    ``init`` is the start vector (``init_is_start``) or the unrestricted forward
    vector at ``s0 - 1``.  With ``use_emissions`` false every emission factor is 1,
    which gives the prior probability of staying inside the mask.  Writes the
    final scaled vector to ``out`` and returns its natural-log scale, or -inf if
    no allowed path stays inside the mask.  Models of at least
    :data:`RESTRICTED_MASKED_MIN` states run :func:`_restricted_masked`, which uses
    the work arrays ``ms``, ``fsrc`` and ``fp`` (see :func:`restricted_scratch`).
    """
    query = (codes, s0, e0, init, init_is_start, mask, use_emissions, E)
    if init.shape[0] >= RESTRICTED_MASKED_MIN:
        return _restricted_masked(*query, pred_ptr, pred_src, pred_p, out, ms, fsrc, fp)
    return _restricted_plain(*query, nz_ptr, nz_state, pred_ptr, pred_src, pred_p, out)


@njit(**_JIT)
def _restricted_plain(
    codes,
    s0,
    e0,
    init,
    init_is_start,
    mask,
    use_emissions,
    E,
    nz_ptr,
    nz_state,
    pred_ptr,
    pred_src,
    pred_p,
    out,
):
    """:func:`restricted_forward` for small models: the emitting masked states only.

    Without emissions the step uses the unknown-symbol code (the last row of ``E``,
    all ones, every state emitting), so one loop serves both cases.
    """
    m = init.shape[0]
    unknown = E.shape[0] - 1
    a = np.zeros(m)
    b = np.zeros(m)
    logscale = 0.0
    for i in range(s0, e0):
        code = codes[i] if use_emissions else unknown
        prev = init if i == s0 else a
        total = 0.0
        b[:] = 0.0
        for k in range(nz_ptr[code], nz_ptr[code + 1]):
            t = nz_state[k]
            if not mask[t]:
                continue
            if i == s0 and init_is_start:
                acc = init[t]
            else:
                acc = 0.0
                for q in range(pred_ptr[t], pred_ptr[t + 1]):
                    acc += prev[pred_src[q]] * pred_p[q]
            v = acc * E[code, t]
            b[t] = v
            total += v
        if total == 0.0:
            out[:] = 0.0
            return -np.inf
        if total < RESCALE_BELOW:
            b *= 1.0 / total
            logscale += math.log(total)
        a, b = b, a
    out[:] = a
    return logscale
