"""Specialised kernels for models where each symbol can be emitted by at most two states.

This covers every two-state model (any order) and the one-state-per-symbol
layouts (the eight-state CpG layout emits one base per state, so a base names
one island state and one background state).  The work per position is then a
2 x 2 block instead of an M x M matrix: the state vector is carried in two local
scalars, ``u0`` and ``u1``, standing for the (at most) two states that can emit
the current code, in increasing state order.

Tables (built by :func:`build` from an :class:`~seqstate.engine.tables.EngineTables`):

* ``K[c]`` -- number of states that can emit code ``c``; ``st[c, j]`` those states
  in increasing order (padded with ``st[c, 0]`` beyond ``K[c]``).  Codes with
  ``K[c] > 2`` (the unknown-base code, emitted by every state, and back-off codes
  whose rows mix several contexts) are *wide*: steps that touch a wide code run a
  plain loop over the dense transition matrix (``T``, ``E``) on compact arrays of
  length ``K``.
* ``cls[c]`` -- the index of the emitting set of a narrow code (codes with the
  same emitting states share a class).
* ``W[q, c, 2*j + k] = T[st[cp, j], st[c, k]] * E[c, st[c, k]]`` for a previous
  code ``cp`` of class ``q``: the forward step is ``v_k = sum_j u_j W[..., j, k]``
  and the backward step ``b_j = sum_k W[..., j, k] b'_k`` with the same table.
  Padded entries are 0.
* ``LT[q, r, 2*j + k] = log T[st_q[j], st_r[k]]`` and ``LE[c, k] =
  log E[c, st[c, k]]`` for Viterbi (-inf where forbidden or padded).  Viterbi
  adds them in the same order as the generic kernel (``delta + log a`` maximised
  over predecessors in increasing order with strict ``>``, then ``+ log e``), so
  its values and paths are identical to the generic kernel's.

Scaling and failure conventions are those of :mod:`seqstate.engine.generic.kernels`
(lazy rescaling below ``RESCALE_BELOW``, natural logs, the failing position is
returned instead of raising).  Checkpoints are written as full M-vectors with
the same meaning as the generic kernels' (scaled vector times exp(log scale)
equals the unscaled forward or backward probability), so the generic segment
and vector queries work on them unchanged.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
from numba import njit

from seqstate.engine._common import JIT as _JIT
from seqstate.engine._common import RESCALE_BELOW, rescale_limit, smallest_factor

if TYPE_CHECKING:
    from seqstate.engine.tables import EngineTables

#: Largest number of states for which the two-state kernels are used.
MAX_STATES = 16
#: Largest number of distinct emitting sets (classes) the tables may hold.
MAX_CLASSES = 64
#: Largest ``classes x codes`` product of the step table (bounded memory).
MAX_TABLE = 1 << 20


@dataclass(frozen=True, eq=False)
class SmallTables:
    """Arrays of the two-state-per-code kernels (see module docstring)."""

    n_states: int
    K: np.ndarray
    st: np.ndarray
    wide: np.ndarray
    cls: np.ndarray
    W: np.ndarray
    LT: np.ndarray
    LE: np.ndarray
    T: np.ndarray
    logT: np.ndarray
    E: np.ndarray
    logE: np.ndarray
    start: np.ndarray
    end: np.ndarray
    log_start: np.ndarray
    log_end: np.ndarray
    kmax: int
    lim: float


def build(tables: EngineTables) -> SmallTables | None:
    """Two-state-per-code tables of ``tables``, or None when the model does not fit.

    It fits when it has at most :data:`MAX_STATES` states and every code of the
    model's full order is emitted by at most two states.  Back-off codes (record
    start, after an unknown base) and the unknown-base code may be wide: they are
    rare, and run the plain loop.
    """
    m = tables.n_states
    if m < 1 or m > MAX_STATES:
        return None
    E = tables.E
    n_codes = E.shape[0]
    emit = E > 0
    K = emit.sum(axis=1).astype(np.int64)
    wide = K > 2
    k = tables.order
    full = [(int(tables.offsets[k]), int(tables.offsets[k + 1]))]
    if tables.mask_codes:  # the soft-masked copies of the full-order codes
        u = tables.mask_codes
        full.append((u + full[0][0], u + full[0][1]))
    if any(wide[lo:hi].any() for lo, hi in full):
        return None
    kmax = max(2, int(K.max()))
    # emitting states in increasing order first (stable sort), padded with the first
    order = np.argsort(~emit, axis=1, kind="stable")[:, :kmax]
    slot = np.arange(kmax)[None, :]
    st = np.where(slot < K[:, None], order, order[:, :1]).astype(np.int64)
    # classes of the narrow codes' emitting sets
    narrow_codes = np.flatnonzero(~wide)
    _, first, inverse = np.unique(
        emit[narrow_codes], axis=0, return_index=True, return_inverse=True
    )
    cls = np.zeros(n_codes, dtype=np.int64)
    cls[narrow_codes] = inverse.reshape(-1)
    reps = narrow_codes[first].tolist()
    ncls = len(reps)
    if ncls > MAX_CLASSES or ncls * n_codes > MAX_TABLE:
        return None
    T = tables.transitions
    # the generic kernel's own logs, so that Viterbi sums are bit-identical
    logT = np.full((m, m), -np.inf)
    for t in range(m):
        lo, hi = tables.pred_ptr[t], tables.pred_ptr[t + 1]
        logT[tables.pred_src[lo:hi], t] = tables.pred_logp[lo:hi]
    narrow = ~wide
    kk = np.arange(2)
    pad = kk[None, :] >= K[:, None]  # (C, 2): padded compact slots
    st2 = st[:, :2]
    e2 = np.take_along_axis(E, st2, axis=1)  # E[c, st[c, k]]
    e2 = np.where(pad | wide[:, None], 0.0, e2)
    LE = np.take_along_axis(tables.logE, st2, axis=1)
    LE = np.where(pad | wide[:, None], -np.inf, LE)
    W = np.zeros((ncls, n_codes, 4))
    LT = np.full((ncls, ncls, 4), -np.inf)
    rep = np.array(reps, dtype=np.int64)
    for q, rp in enumerate(reps):
        for j in range(int(K[rp])):
            s_j = st[rp, j]
            # W[q, c, 2j + k] = T[s_j, st[c, k]] * E[c, st[c, k]]
            W[q, :, 2 * j : 2 * j + 2] = np.where(narrow[:, None], T[s_j][st2] * e2, 0.0)
            for k in range(2):
                ok = k < K[rep]
                LT[q, :, 2 * j + k] = np.where(ok, logT[s_j][st[rep, k]], -np.inf)
    return SmallTables(
        n_states=m,
        K=K,
        st=st,
        wide=wide,
        cls=cls,
        W=W,
        LT=LT,
        LE=LE,
        T=np.ascontiguousarray(T),
        logT=np.ascontiguousarray(logT),
        E=tables.E,
        logE=tables.logE,
        start=tables.start,
        end=tables.end,
        log_start=tables.log_start,
        log_end=tables.log_end,
        kmax=kmax,
        lim=rescale_limit(smallest_factor(tables.pred_p, tables.E)),
    )


def group_table(small: SmallTables, group: np.ndarray) -> np.ndarray:
    """Per code and compact index the output column (``group[st[c, j]]``, -1 for padding)."""
    n_codes, kmax = small.st.shape
    gc = np.full((n_codes, kmax), -1, dtype=np.int64)
    for c in range(n_codes):
        for j in range(small.K[c]):
            gc[c, j] = group[small.st[c, j]]
    return gc


# ----------------------------------------------------------------- wide steps
@njit(**_JIT)
def _wide_forward(ua, cp, va, c, K, st, T, E):
    """va[k] = E[c, t_k] * sum_j ua[j] T[s_j, t_k] over the compact states; returns the sum."""
    total = 0.0
    for k in range(K[c]):
        t = st[c, k]
        acc = 0.0
        for j in range(K[cp]):
            acc += ua[j] * T[st[cp, j], t]
        v = acc * E[c, t]
        va[k] = v
        total += v
    for k in range(K[c], va.shape[0]):
        va[k] = 0.0
    return total


@njit(**_JIT)
def _wide_backward(ba, c, bn, cn, K, st, T, E):
    """ba[j] = sum_k T[s_j, t_k] E[cn, t_k] bn[k] (s_j states of c, t_k of cn); returns the sum."""
    total = 0.0
    for j in range(K[c]):
        s = st[c, j]
        acc = 0.0
        for k in range(K[cn]):
            t = st[cn, k]
            acc += T[s, t] * (E[cn, t] * bn[k])
        ba[j] = acc
        total += acc
    for j in range(K[c], ba.shape[0]):
        ba[j] = 0.0
    return total


@njit(**_JIT)
def _full_backward(full, bn, cn, K, st, T, E):
    """Full backward vector full[s] = sum_k T[s, t_k] E[cn, t_k] bn[k]; returns its sum."""
    m = full.shape[0]
    total = 0.0
    for s in range(m):
        acc = 0.0
        for k in range(K[cn]):
            t = st[cn, k]
            acc += T[s, t] * (E[cn, t] * bn[k])
        full[s] = acc
        total += acc
    return total


@njit(**_JIT)
def _wide_viterbi(da, cp, va, bpa, c, K, st, logT, logE):
    """Max-product step on compact arrays; bpa[k] = compact index of the best predecessor."""
    best_any = -np.inf
    for k in range(K[c]):
        t = st[c, k]
        best = -np.inf
        arg = -1
        for j in range(K[cp]):
            v = da[j] + logT[st[cp, j], t]
            if v > best:
                best = v
                arg = j
        if arg >= 0:
            v = best + logE[c, t]
        else:
            v = -np.inf
            arg = 0
        va[k] = v
        bpa[k] = arg
        if v > best_any:
            best_any = v
    for k in range(K[c], va.shape[0]):
        va[k] = -np.inf
        bpa[k] = 0
    return best_any


# ----------------------------------------------------------------- forward
# Kept for speed: the whole-record log-likelihood of this family, a copy of the forward
# recursion of seqstate.engine.small.posterior.forward_chunk without its checkpoint test.
# Measured (2 Mbp, median of 9, same process, shared 2-core machine): forward_chunk as the
# whole-record loglik took 9.8 ms against 4.5 ms here (cpg-island) and 9.8 against 7.8 ms
# (cpg-island-8); the bench_engine forward ratio against hmmlearn fell 64.9x -> 40.1x.
@njit(**_JIT)
def forward_loglik(codes, start, end, K, st, wide, cls, W, T, E, lim=RESCALE_BELOW):
    """Total log-likelihood (natural log); (loglik, fail_position) as the generic kernel."""
    n = codes.shape[0]
    kmax = st.shape[1]
    ua = np.zeros(kmax)
    va = np.zeros(kmax)
    logscale = 0.0
    c = codes[0]
    total = 0.0
    for k in range(K[c]):
        v = start[st[c, k]] * E[c, st[c, k]]
        ua[k] = v
        total += v
    if total == 0.0:
        return -np.inf, 0
    if total < lim:
        inv = 1.0 / total
        for k in range(kmax):
            ua[k] *= inv
        logscale += math.log(total)
    u0 = ua[0]
    u1 = ua[1]
    cp = c
    for i in range(1, n):
        c = codes[i]
        if wide[cp] or wide[c]:
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
                logscale += math.log(s)
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
                logscale += math.log(s)
            u0 = v0
            u1 = v1
        cp = c
    if not wide[cp]:
        ua[0] = u0
        ua[1] = u1
    final = 0.0
    for k in range(K[cp]):
        final += ua[k] * end[st[cp, k]]
    if final == 0.0:
        return -np.inf, n
    return math.log(final) + logscale, -1


# ----------------------------------------------------------------- Viterbi
