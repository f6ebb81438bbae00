"""Generic segment queries (numba): forward and backward vectors at a position, recomputed
from a posterior's checkpoints, and forward passes constrained to an allowed set of
states per position (one set for a plain segment, a class per position for a path).

Tables, scaling and failure conventions are those of :mod:`seqstate.engine.generic.kernels`.
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


def one_class(start0: int, end0: int, mask: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``(cls, allowed)`` of a segment whose every base is in ``mask``: class 0 at each
    of its positions, ``mask`` the one allowed set."""
    cls = np.zeros(max(0, end0 - start0), dtype=np.int64)
    return cls, np.asarray(mask, dtype=np.bool_).reshape(1, -1)


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


def constrained_scratch(
    m: int, nnz: int, n_classes: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Work arrays ``(ms, fsrc, fp)`` of :func:`constrained_forward` for ``n_classes``
    allowed sets (``nnz`` allowed moves); empty below :data:`RESTRICTED_MASKED_MIN`
    states, where they are not used."""
    k = max(1, int(n_classes))
    if m < RESTRICTED_MASKED_MIN:
        m = nnz = 0
    return work_buffer(k * m, np.int64), work_buffer(k * nnz, np.int64), work_buffer(k * nnz)


@njit(**_JIT)
def _constrained_masked(
    codes,
    s0,
    e0,
    init,
    init_is_start,
    cls,
    allowed,
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
    """:func:`constrained_forward` for large models: the same values up to rounding.

    Per class, its allowed states and, for each, its predecessors allowed in the
    same class are listed once per call.  Inside a run of one class a state sums
    over those predecessors only (the others hold 0); at the first position of a
    run (another class before it) it sums over every predecessor, the rows being 0
    outside the class last written in them.  Every allowed state is written at
    every position (0 where it cannot emit); a row is cleared only where it held
    another class.  The rescaling total is summed by four interleaved partial sums.
    Work arrays: ``ms`` (int64, K * M entries), ``fsrc`` (int64) and ``fp``
    (float64), both K times as long as ``pred_src``; only their first entries are used.
    """
    m = init.shape[0]
    nk = allowed.shape[0]
    sptr = np.zeros(nk + 1, dtype=np.int64)
    nm = 0
    for k in range(nk):
        for t in range(m):
            if allowed[k, t]:
                nm += 1
        sptr[k + 1] = nm
    fptr = np.zeros(nm + 1, dtype=np.int64)
    j = 0
    for k in range(nk):
        for t in range(m):
            if allowed[k, t]:
                ms[j] = t
                cnt = 0
                for q in range(pred_ptr[t], pred_ptr[t + 1]):
                    if allowed[k, pred_src[q]]:
                        cnt += 1
                fptr[j + 1] = fptr[j] + cnt
                j += 1
    j = 0
    for k in range(nk):
        for jj in range(sptr[k], sptr[k + 1]):
            t = ms[jj]
            kq = fptr[jj]
            for q in range(pred_ptr[t], pred_ptr[t + 1]):
                if allowed[k, pred_src[q]]:
                    fsrc[kq] = pred_src[q]
                    fp[kq] = pred_p[q]
                    kq += 1
    a = np.zeros(m)
    b = np.zeros(m)
    a_cls = -1  # the class whose states a row was last written at (-1: all 0)
    b_cls = -1
    logscale = 0.0
    for i in range(s0, e0):
        c = uintp(codes[i])
        k = cls[i - s0]
        lo = sptr[k]
        hi = sptr[k + 1]
        if b_cls >= 0 and b_cls != k:
            for jj in range(sptr[b_cls], sptr[b_cls + 1]):
                b[uintp(ms[jj])] = 0.0
        if i == s0:
            for jj in range(lo, hi):
                t = uintp(ms[jj])
                if init_is_start:
                    acc = init[t]
                else:
                    acc = 0.0
                    for q in range(uintp(pred_ptr[t]), uintp(pred_ptr[t + _ONE])):
                        acc += init[uintp(pred_src[q])] * pred_p[q]
                b[t] = acc * E[c, t] if use_emissions else acc
        elif a_cls != k:
            for jj in range(lo, hi):
                t = uintp(ms[jj])
                acc = 0.0
                for q in range(uintp(pred_ptr[t]), uintp(pred_ptr[t + _ONE])):
                    acc += a[uintp(pred_src[q])] * pred_p[q]
                b[t] = acc * E[c, t] if use_emissions else acc
        elif use_emissions:
            for jj in range(lo, hi):
                t = uintp(ms[jj])
                acc = 0.0
                for q in range(uintp(fptr[jj]), uintp(fptr[jj + 1])):
                    acc += a[uintp(fsrc[q])] * fp[q]
                b[t] = acc * E[c, t]
        else:
            for jj in range(lo, hi):
                acc = 0.0
                for q in range(uintp(fptr[jj]), uintp(fptr[jj + 1])):
                    acc += a[uintp(fsrc[q])] * fp[q]
                b[uintp(ms[jj])] = acc
        b_cls = k
        t0 = t1 = t2 = t3 = 0.0
        jj = lo
        while jj + 4 <= hi:
            t0 += b[uintp(ms[jj])]
            t1 += b[uintp(ms[jj + 1])]
            t2 += b[uintp(ms[jj + 2])]
            t3 += b[uintp(ms[jj + 3])]
            jj += 4
        while jj < hi:
            t0 += b[uintp(ms[jj])]
            jj += 1
        total = (t0 + t1) + (t2 + t3)
        if total == 0.0:
            out[:] = 0.0
            return -np.inf
        if total < RESCALE_BELOW:
            inv = 1.0 / total
            for jj in range(lo, hi):
                b[uintp(ms[jj])] *= inv
            logscale += math.log(total)
        a, b = b, a
        a_cls, b_cls = b_cls, a_cls
    out[:] = a
    return logscale


def constrained_forward(
    codes: np.ndarray,
    s0: int,
    e0: int,
    init: np.ndarray,
    init_is_start: bool,
    cls: np.ndarray,
    allowed: np.ndarray,
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
    """Forward over positions s0..e0-1, position i through the states of
    ``allowed[cls[i - s0]]`` only.

    ``cls`` (int64, e0 - s0 entries) gives each position's class, ``allowed``
    (bool, K x M) each class's states.  ``init`` is the start vector
    (``init_is_start``) or the unrestricted forward vector at ``s0 - 1``.  With
    ``use_emissions`` false every emission factor is 1, which gives the prior
    probability of a path through the allowed sets.  Writes the final scaled vector
    to ``out`` and returns its natural-log scale, or -inf if no allowed path exists.
    Models of at least :data:`RESTRICTED_MASKED_MIN` states run
    :func:`_constrained_masked`, which uses the work arrays ``ms``, ``fsrc`` and ``fp``
    (see :func:`constrained_scratch`).
    """
    query = (codes, s0, e0, init, init_is_start, cls, allowed, use_emissions, E)
    if init.shape[0] >= RESTRICTED_MASKED_MIN:
        return _constrained_masked(*query, pred_ptr, pred_src, pred_p, out, ms, fsrc, fp)
    return _constrained_plain(*query, nz_ptr, nz_state, pred_ptr, pred_src, pred_p, out)


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
    """Forward over positions s0..e0-1 through the states with ``mask[s]`` only: the
    one-class case of :func:`constrained_forward` (same arguments otherwise; work
    arrays as :func:`restricted_scratch` gives them)."""
    query = (codes, s0, e0, init, init_is_start, *one_class(s0, e0, mask), use_emissions, E)
    moves = (nz_ptr, nz_state, pred_ptr, pred_src, pred_p)
    return constrained_forward(*query, *moves, out, ms, fsrc, fp)


@njit(**_JIT)
def _constrained_plain(
    codes,
    s0,
    e0,
    init,
    init_is_start,
    cls,
    allowed,
    use_emissions,
    E,
    nz_ptr,
    nz_state,
    pred_ptr,
    pred_src,
    pred_p,
    out,
):
    """:func:`constrained_forward` for small models: the emitting allowed states only.

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
        k = cls[i - s0]
        prev = init if i == s0 else a
        total = 0.0
        b[:] = 0.0
        for kk in range(nz_ptr[code], nz_ptr[code + 1]):
            t = nz_state[kk]
            if not allowed[k, t]:
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


def _restricted_plain(
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
) -> float:
    """The small-model loop of :func:`restricted_forward` whatever the model's size."""
    query = (codes, s0, e0, init, init_is_start, *one_class(s0, e0, mask), use_emissions, E)
    return float(_constrained_plain(*query, nz_ptr, nz_state, pred_ptr, pred_src, pred_p, out))
