"""Expected counts for Baum–Welch: a checkpointed forward–backward that accumulates them.

One record, encoded as emission codes (see :mod:`seqstate.engine.tables`), and one
model's :class:`TrainingTables` give, pooled into :class:`Accumulators`:

* ``start[s]`` -- P(z_0 = s | x);
* ``trans[s, t]`` -- sum over i of P(z_i = s, z_{i+1} = t | x);
* ``end[s]`` -- P(z_last = s | x), the expected count of ending in s;
* ``emit[c, s]`` -- sum over the positions i with code c of P(z_i = s | x).

The caller maps codes to emission-table cells (only full-order codes count
towards the order-k table; see :mod:`seqstate.commands.fit`).

Algorithm (our own arrangement of the scaled forward–backward of Rabiner 1989,
section V.A): pass 1 runs forward over the record, keeps the forward vector at
the first position of every block of ``block`` positions and the natural-log
scale of the whole pass (the log-likelihood).  Pass 2 walks the blocks from the
last to the first: it recomputes the block's forward vectors from its
checkpoint, then runs the backward recursion through the block and adds each
position's posterior and each step's pair posterior
``xi_i(s, t) = alpha_i(s) a(s, t) e_{i+1}(t) beta_{i+1}(t) / sum_s alpha_i(s) beta_i(s)``.
Working memory is O(M * (N / block + block)), O(M sqrt N) with the default
``block`` of about sqrt(N).  Scaling follows :mod:`seqstate.engine.generic.kernels`:
vectors are rescaled lazily when their sum falls below :data:`RESCALE_BELOW`; each
posterior is normalised at its own position, so the scales cancel.

Two loop layouts, same results up to rounding:

* ``pairs`` (mode 0): a step from position i to i+1 visits the pairs (s, t)
  of states that can emit the codes at i and i+1, reading a dense transition
  matrix.  Cheap when few states emit each code (the one-state-per-base
  layouts: 2 x 2 pairs per step for the eight-state CpG model) and for small
  dense models;
* ``lists`` (mode 1): a step visits the allowed transitions into (forward) or
  out of (backward) the emitting states, from predecessor and successor lists.
  Cheap for large models with sparse transitions.

:func:`training_tables` picks the layout with the smaller estimated work.
Kernels never raise: they return the first impossible position (or -1).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numba import njit

from seqstate.engine import _common
from seqstate.engine._common import JIT as _JIT
from seqstate.engine._common import RESCALE_BELOW, code_table, transition_lists
from seqstate.model import Model

MODE_PAIRS = 0
MODE_LISTS = 1


@dataclass
class TrainingTables:
    """Arrays of :func:`accumulate` for one model (plain float64/int64 arrays).

    ``E[c, s]`` is the emission factor of code ``c`` in state ``s`` with the
    code layout of :mod:`seqstate.engine.tables` (``offsets``; the last code is the
    unknown symbol, factor 1).  ``T``/``TT`` are the dense transition matrix
    and its transpose; ``pred_*``/``succ_*`` the allowed transitions by to-state
    and by from-state; ``nz_*`` the states with a non-zero factor per code.
    """

    n_states: int
    n_symbols: int
    order: int
    start: np.ndarray
    end: np.ndarray
    T: np.ndarray
    TT: np.ndarray
    E: np.ndarray
    nz_ptr: np.ndarray
    nz_state: np.ndarray
    pred_ptr: np.ndarray
    pred_src: np.ndarray
    pred_p: np.ndarray
    succ_ptr: np.ndarray
    succ_dst: np.ndarray
    succ_p: np.ndarray
    offsets: np.ndarray
    mode: int

    @property
    def n_codes(self) -> int:
        return self.E.shape[0]


@dataclass
class Accumulators:
    """Expected counts pooled over records (see module docstring)."""

    start: np.ndarray
    trans: np.ndarray
    end: np.ndarray
    emit: np.ndarray

    @classmethod
    def zeros(cls, tables: TrainingTables) -> Accumulators:
        m = tables.n_states
        return cls(np.zeros(m), np.zeros((m, m)), np.zeros(m), np.zeros((tables.n_codes, m)))


def training_tables(
    model: Model, lower: dict[int, np.ndarray], *, mode: int | None = None, mask: bool = False
) -> TrainingTables:
    """Kernel arrays of ``model`` with the given back-off rows.

    ``lower[j]`` (shape ``(M, A**j, A)``, complete, for every ``j < order``) are
    the emission rows of positions with a context of only j symbols: EM holds
    them fixed (see :mod:`seqstate.commands.fit`).  ``mode`` forces a loop layout
    (:data:`MODE_PAIRS` or :data:`MODE_LISTS`); by default the cheaper one.  ``mask``:
    the codes read the mask as evidence through the model's mask table (the doubled
    code layout of :mod:`seqstate.engine.tables`).
    """
    m = model.n_states
    if mask and model.mask is None:
        raise ValueError(f"model '{model.name}' has no mask table")
    offsets, E, nz_ptr, nz_state = code_table(model, lower, mask=model.mask if mask else None)
    T = np.ascontiguousarray(model.transitions, dtype=np.float64)
    pred_ptr, pred_src, pred_p, succ_ptr, succ_dst, succ_p = transition_lists(T)
    if mode is None:
        width = np.diff(nz_ptr).astype(float)
        n_pred = np.diff(pred_ptr).astype(float)
        pair_cost = float(np.mean(width**2))
        nz = [nz_state[nz_ptr[c] : nz_ptr[c + 1]] for c in range(E.shape[0])]
        list_cost = float(np.mean([n_pred[v].sum() for v in nz])) + m
        mode = MODE_PAIRS if pair_cost <= list_cost else MODE_LISTS
    end = np.ones(m) if model.end is None else np.asarray(model.end, dtype=np.float64)
    return TrainingTables(
        n_states=m,
        n_symbols=len(model.alphabet),
        order=model.order,
        start=np.asarray(model.start, dtype=np.float64).copy(),
        end=end.copy(),
        T=T,
        TT=np.ascontiguousarray(T.T),
        E=E,
        nz_ptr=nz_ptr,
        nz_state=nz_state,
        pred_ptr=pred_ptr,
        pred_src=pred_src,
        pred_p=pred_p,
        succ_ptr=succ_ptr,
        succ_dst=succ_dst,
        succ_p=succ_p,
        offsets=offsets,
        mode=int(mode),
    )


def default_block(n: int) -> int:
    """Checkpoint block length of training: about sqrt(N), at least 256 positions."""
    return _common.default_block(n, _common.TRAINING_MIN_BLOCK)


def accumulate(
    tables: TrainingTables, codes: np.ndarray, acc: Accumulators, block: int | None = None
) -> tuple[float, int]:
    """Add one record's expected counts to ``acc``; returns (loglik, fail_position).

    ``loglik`` is the natural log of P(x); ``fail_position`` is -1 for a
    possible record, else the 0-based position at which every state became
    impossible (``len(codes)`` when no state that may end is reachable at the
    last base), and ``acc`` is then left partly updated: discard it.
    """
    n = codes.shape[0]
    if n == 0:
        raise ValueError("empty record")
    block = default_block(n) if block is None else max(1, min(int(block), n))
    t = tables
    out = (acc.start, acc.trans, acc.end, acc.emit)
    if t.mode == MODE_PAIRS:
        dense = (t.E, t.T, t.TT, t.nz_ptr, t.nz_state)
        return _accumulate_pairs(codes, t.start, t.end, *dense, block, *out)
    moves = (t.pred_ptr, t.pred_src, t.pred_p, t.succ_ptr, t.succ_dst, t.succ_p)
    return _accumulate_lists(codes, t.start, t.end, t.E, t.nz_ptr, t.nz_state, *moves, block, *out)


# ----------------------------------------------------------------- kernels
# The two layouts are written out in full (no helper calls in the inner loops: numba
# does not inline them reliably, and a call per position costs more than the work; for
# the two-state kernels a shared step made the forward pass 60x slower, see
# engine/small/posterior.py).


@njit(**_JIT)
def _first_vector(a, c, start, E, nz_ptr, nz_state):
    """a[s] = start[s] E[c, s] for the states that emit code ``c``; returns the sum."""
    total = 0.0
    for q in range(nz_ptr[c], nz_ptr[c + 1]):
        s = nz_state[q]
        v = start[s] * E[c, s]
        a[s] = v
        total += v
    return total


@njit(**_JIT)
def _accumulate_pairs(
    codes, start, end, E, T, TT, nz_ptr, nz_state, block, start_acc, trans_acc, end_acc, emit_acc
):
    """Layout ``pairs``: vectors hold meaningful values only for the emitting states."""
    n = codes.shape[0]
    m = start.shape[0]
    nblocks = (n + block - 1) // block
    ck = np.zeros((nblocks, m))
    # ---- pass 1: forward, checkpoint at each block's first position
    a = np.zeros(m)
    b = np.zeros(m)
    logscale = 0.0
    c = codes[0]
    total = _first_vector(a, c, start, E, nz_ptr, nz_state)
    if total == 0.0:
        return -np.inf, 0
    if total < RESCALE_BELOW:
        a *= 1.0 / total
        logscale += math.log(total)
    ck[0, :] = a
    for i in range(1, n):
        cp = c
        c = codes[i]
        p0 = nz_ptr[cp]
        p1 = nz_ptr[cp + 1]
        total = 0.0
        for q in range(nz_ptr[c], nz_ptr[c + 1]):
            t = nz_state[q]
            acc = 0.0
            for r in range(p0, p1):
                s = nz_state[r]
                acc += a[s] * TT[t, s]
            v = acc * E[c, t]
            b[t] = v
            total += v
        if total < RESCALE_BELOW:
            if total == 0.0:
                return -np.inf, i
            b *= 1.0 / total
            logscale += math.log(total)
        a, b = b, a
        if i % block == 0:
            ck[i // block, :] = a
    final = 0.0
    for q in range(nz_ptr[c], nz_ptr[c + 1]):
        s = nz_state[q]
        final += a[s] * end[s]
    if final == 0.0:
        return -np.inf, n
    loglik = math.log(final) + logscale
    # ---- pass 2: blocks from last to first; backward recursion with the counts
    buf = np.zeros((min(block, n), m))
    beta = np.zeros(m)  # backward vector at i + 1 (states emitting codes[i + 1])
    cur = np.zeros(m)  # backward vector at i
    w = np.zeros(m)
    c = codes[n - 1]
    for q in range(nz_ptr[c], nz_ptr[c + 1]):
        s = nz_state[q]
        beta[s] = end[s]
    for bk in range(nblocks - 1, -1, -1):
        b0 = bk * block
        b1 = min(n, b0 + block)
        for s in range(m):
            buf[0, s] = ck[bk, s]
        for i in range(b0 + 1, b1):
            cp = codes[i - 1]
            c = codes[i]
            p0 = nz_ptr[cp]
            p1 = nz_ptr[cp + 1]
            k = i - b0
            total = 0.0
            for q in range(nz_ptr[c], nz_ptr[c + 1]):
                t = nz_state[q]
                acc = 0.0
                for r in range(p0, p1):
                    s = nz_state[r]
                    acc += buf[k - 1, s] * TT[t, s]
                v = acc * E[c, t]
                buf[k, t] = v
                total += v
            if total < RESCALE_BELOW and total > 0.0:
                inv = 1.0 / total
                for q in range(nz_ptr[c], nz_ptr[c + 1]):
                    buf[k, nz_state[q]] *= inv
        for i in range(b1 - 1, b0 - 1, -1):
            k = i - b0
            c = codes[i]
            q0 = nz_ptr[c]
            q1 = nz_ptr[c + 1]
            norm = 0.0
            if i == n - 1:
                for q in range(q0, q1):
                    s = nz_state[q]
                    cur[s] = beta[s]
                    norm += buf[k, s] * beta[s]
                if norm == 0.0:
                    return -np.inf, i
            else:
                cn = codes[i + 1]
                r0 = nz_ptr[cn]
                r1 = nz_ptr[cn + 1]
                for r in range(r0, r1):
                    t = nz_state[r]
                    w[t] = E[cn, t] * beta[t]
                # beta_i(s) = sum_t a(s, t) w(t); norm = sum_s alpha_i(s) beta_i(s)
                bsum = 0.0
                for q in range(q0, q1):
                    s = nz_state[q]
                    acc = 0.0
                    for r in range(r0, r1):
                        t = nz_state[r]
                        acc += T[s, t] * w[t]
                    cur[s] = acc
                    bsum += acc
                    norm += buf[k, s] * acc
                if norm == 0.0:
                    return -np.inf, i
                inv = 1.0 / norm
                # pair posteriors of the step i -> i + 1
                for q in range(q0, q1):
                    s = nz_state[q]
                    fs = buf[k, s] * inv
                    if fs != 0.0:
                        for r in range(r0, r1):
                            t = nz_state[r]
                            trans_acc[s, t] += fs * T[s, t] * w[t]
                if bsum < RESCALE_BELOW:
                    scale = 1.0 / bsum
                    for q in range(q0, q1):
                        cur[nz_state[q]] *= scale
                    norm *= scale
            # posterior of position i; beta_i becomes the "next" vector of step i - 1
            inv = 1.0 / norm
            for q in range(q0, q1):
                s = nz_state[q]
                g = buf[k, s] * cur[s] * inv
                emit_acc[c, s] += g
                beta[s] = cur[s]
                if i == 0:
                    start_acc[s] += g
                if i == n - 1:
                    end_acc[s] += g
    return loglik, -1


@njit(**_JIT)
def _accumulate_lists(
    codes,
    start,
    end,
    E,
    nz_ptr,
    nz_state,
    pred_ptr,
    pred_src,
    pred_p,
    succ_ptr,
    succ_dst,
    succ_p,
    block,
    start_acc,
    trans_acc,
    end_acc,
    emit_acc,
):
    """Layout ``lists``: full vectors, zero for the states that do not emit the code."""
    n = codes.shape[0]
    m = start.shape[0]
    nblocks = (n + block - 1) // block
    ck = np.zeros((nblocks, m))
    # ---- pass 1: forward, checkpoint at each block's first position
    a = np.zeros(m)
    b = np.zeros(m)
    logscale = 0.0
    c = codes[0]
    total = _first_vector(a, c, start, E, nz_ptr, nz_state)
    if total == 0.0:
        return -np.inf, 0
    if total < RESCALE_BELOW:
        a *= 1.0 / total
        logscale += math.log(total)
    ck[0, :] = a
    for i in range(1, n):
        c = codes[i]
        b[:] = 0.0
        total = 0.0
        for q in range(nz_ptr[c], nz_ptr[c + 1]):
            t = nz_state[q]
            acc = 0.0
            for r in range(pred_ptr[t], pred_ptr[t + 1]):
                acc += a[pred_src[r]] * pred_p[r]
            v = acc * E[c, t]
            b[t] = v
            total += v
        if total < RESCALE_BELOW:
            if total == 0.0:
                return -np.inf, i
            b *= 1.0 / total
            logscale += math.log(total)
        a, b = b, a
        if i % block == 0:
            ck[i // block, :] = a
    final = 0.0
    for s in range(m):
        final += a[s] * end[s]
    if final == 0.0:
        return -np.inf, n
    loglik = math.log(final) + logscale
    # ---- pass 2: blocks from last to first; backward recursion with the counts
    buf = np.zeros((min(block, n), m))
    beta = np.zeros(m)
    cur = np.zeros(m)
    w = np.zeros(m)
    c = codes[n - 1]
    for q in range(nz_ptr[c], nz_ptr[c + 1]):
        s = nz_state[q]
        beta[s] = end[s]
    for bk in range(nblocks - 1, -1, -1):
        b0 = bk * block
        b1 = min(n, b0 + block)
        for s in range(m):
            buf[0, s] = ck[bk, s]
        for i in range(b0 + 1, b1):
            c = codes[i]
            k = i - b0
            for s in range(m):
                buf[k, s] = 0.0
            total = 0.0
            for q in range(nz_ptr[c], nz_ptr[c + 1]):
                t = nz_state[q]
                acc = 0.0
                for r in range(pred_ptr[t], pred_ptr[t + 1]):
                    acc += buf[k - 1, pred_src[r]] * pred_p[r]
                v = acc * E[c, t]
                buf[k, t] = v
                total += v
            if total < RESCALE_BELOW and total > 0.0:
                inv = 1.0 / total
                for s in range(m):
                    buf[k, s] *= inv
        for i in range(b1 - 1, b0 - 1, -1):
            k = i - b0
            c = codes[i]
            q0 = nz_ptr[c]
            q1 = nz_ptr[c + 1]
            norm = 0.0
            if i == n - 1:
                for q in range(q0, q1):
                    s = nz_state[q]
                    cur[s] = beta[s]
                    norm += buf[k, s] * beta[s]
                if norm == 0.0:
                    return -np.inf, i
            else:
                cn = codes[i + 1]
                for s in range(m):
                    w[s] = 0.0
                for r in range(nz_ptr[cn], nz_ptr[cn + 1]):
                    t = nz_state[r]
                    w[t] = E[cn, t] * beta[t]
                bsum = 0.0
                for q in range(q0, q1):
                    s = nz_state[q]
                    acc = 0.0
                    for r in range(succ_ptr[s], succ_ptr[s + 1]):
                        acc += succ_p[r] * w[succ_dst[r]]
                    cur[s] = acc
                    bsum += acc
                    norm += buf[k, s] * acc
                if norm == 0.0:
                    return -np.inf, i
                inv = 1.0 / norm
                for q in range(q0, q1):
                    s = nz_state[q]
                    fs = buf[k, s] * inv
                    if fs != 0.0:
                        for r in range(succ_ptr[s], succ_ptr[s + 1]):
                            t = succ_dst[r]
                            trans_acc[s, t] += fs * succ_p[r] * w[t]
                if bsum < RESCALE_BELOW:
                    scale = 1.0 / bsum
                    for q in range(q0, q1):
                        cur[nz_state[q]] *= scale
                    norm *= scale
            inv = 1.0 / norm
            for q in range(q0, q1):
                s = nz_state[q]
                g = buf[k, s] * cur[s] * inv
                emit_acc[c, s] += g
                beta[s] = cur[s]
                if i == 0:
                    start_acc[s] += g
                if i == n - 1:
                    end_acc[s] += g
    return loglik, -1


# ----------------------------------------------------------------- known paths
@njit(**_JIT)
def count_known_path(codes, states, E, T, lo, hi, trans_acc, emit_acc):
    """Add the counts of one record's known state path (``states[i] = -1``: unknown).

    ``trans_acc[s, t]`` counts the steps s -> t between two known states;
    ``emit_acc[s, c - lo]`` the known-state positions whose code ``c`` lies in
    ``[lo, hi)`` (the full-order codes).  Checks the path as it goes and
    returns ``(kind, position)``: ``(0, -1)`` when it is allowed, ``(1, i)`` when
    the step i -> i + 1 has transition probability 0, ``(2, i)`` when the state
    at i has emission factor 0 for its code (the counts are then incomplete).
    """
    n = codes.shape[0]
    for i in range(n):
        s = states[i]
        if s < 0:
            continue
        c = codes[i]
        if E[c, s] == 0.0:
            return 2, i
        if c >= lo and c < hi:
            emit_acc[s, c - lo] += 1.0
        if i + 1 < n:
            t = states[i + 1]
            if t >= 0:
                if T[s, t] == 0.0:
                    return 1, i
                trans_acc[s, t] += 1.0
    return 0, -1
