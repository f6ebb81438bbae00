"""Kernels for large sparse models whose states mostly have one predecessor and one successor.

Gene-structure layouts are long chains: in the gene-segment model 256 of 289
states have exactly one predecessor and one successor, and most of its 371
allowed transitions are those chain links.  The generic kernels of
:mod:`seqstate.engine.generic.kernels` search every state's predecessor list (a compare
and a branch per transition), reset every row and, in Viterbi, recompute the
whole record for the traceback.  Here:

* States are renumbered once (:func:`build`) so that chains are consecutive:
  the allowed moves ``p -> t`` are laid out as paths, preferring moves where
  ``t`` has no other predecessor and ``p`` no other successor.  A state whose only
  predecessor is the state numbered just before it is *linked forward*; one whose
  only successor is the state numbered just after it is *linked backward*.  The
  others are *fix* states (33 with several predecessors and 13 chain heads in
  the gene-segment model).
* Running vectors have ``M + 2`` slots: state ``t`` (new number) lives in slot
  ``t + 1``; slots 0 and ``M + 1`` are dummies that always hold 0 (-inf in log
  space).  A forward step is first one contiguous, branch-free pass over every
  state, ``y[t + 1] = x[t] * w1[c, t]`` with ``w1[c, t]`` the probability of the
  move from the state numbered just before times the emission factor of code
  ``c`` (0 for fix states), which the compiler vectorises.  Then the fix states
  that can emit ``c`` are overwritten from their predecessor lists.  Backward
  steps do the same with ``y[s + 1] = v1[c, s] * x[s + 2]``.  Every state is
  written at every position (0 / -inf where it cannot emit), so no row is reset.
* The fix states' moves are kept per code, only those whose target can emit the
  code, as one flat list: first each state's first predecessor (assigned), then each
  state's second predecessor (added), and so on.  No inner loop, no branch on a
  list length, and consecutive entries update different states.
* Emission factors are folded into those weights, so each transition costs one
  multiply-add.  The posterior kernels therefore round differently from the
  generic ones (products grouped differently, sums in another order):
  agreement is to about 1e-15 relative, not bit for bit.
* Rescaling tests the largest entry of a vector (an integer maximum over the bit
  patterns of non-negative doubles: exact, order-free and vectorised) instead of
  a floating-point sum, and multiplies by a power of two (exact); the scale is
  kept as an integer binary exponent.
* Viterbi keeps the generic kernel's exact arithmetic, ``(delta[p] + log a[p, t]) +
  log e[t]`` with the predecessors of a state visited in increasing original index
  and a strict ``>`` (the lowest index wins ties), and the lowest original index
  among equal final states, so its paths and log probabilities are identical to
  the generic kernel's.  A state with one predecessor has its back-pointer known
  in advance; only the states with several predecessors store one per position
  (one byte each: the rank of the winner in the predecessor list).  When the whole
  record's back-pointers fit (``block = N``) the traceback needs no second pass;
  otherwise the delta vector is checkpointed every ``block`` positions and the
  blocks are recomputed during the traceback, as in the generic kernel.

Scaling, failure and checkpoint conventions are those of
:mod:`seqstate.engine.generic.kernels` (a vector is rescaled when its largest entry,
rather than its sum, falls below the threshold, which rescales at least as
often); checkpoints are written in the original state order, so the generic
segment and vector queries work on them unchanged.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
from numba import njit, uintp

from seqstate.engine._common import JIT as _JIT
from seqstate.engine.buffers import work_buffer

if TYPE_CHECKING:
    from seqstate.engine.tables import EngineTables

#: Use these kernels when at least this share of the states has at most one predecessor.
MIN_CHAIN_SHARE = 0.5
#: Smallest model for which these kernels are used (below, the generic ones do as well).
MIN_STATES = 32


@dataclass(frozen=True, eq=False)
class SparseTables:
    """Arrays of the chain-sparse kernels (see module docstring); states renumbered.

    Slots are new state numbers + 1.  Per code ``c`` the fix moves are entries
    ``q`` in ``[ptr[c], ptr[c + 1])``, the first ``n0[c]`` of them each state's
    first (lowest original index) predecessor, then the second ones, and so on;
    ``dst``/``src`` are the slots written and read.
    """

    n_states: int
    perm: np.ndarray  # new number -> original index
    inv: np.ndarray  # original index -> new number
    w1: np.ndarray  # (C, M) forward weight of the move from the state numbered before
    la1: np.ndarray  # (M,) its log probability (-inf if not linked)
    f_ptr: np.ndarray  # forward fix moves per code
    f_n0: np.ndarray
    f_dst: np.ndarray
    f_src: np.ndarray
    f_w: np.ndarray  # a[p, t] E[c, t]
    f_lp: np.ndarray  # log a[p, t]
    f_rank: np.ndarray  # rank of p among t's predecessors
    f_col: np.ndarray  # back-pointer column of t (n_multi for single-predecessor states)
    n_multi: int  # states with several predecessors (back-pointer columns)
    v1: np.ndarray  # (C, M) backward weight of the move to the state numbered after
    b_ptr: np.ndarray  # backward fix moves per code
    b_n0: np.ndarray
    b_dst: np.ndarray
    b_src: np.ndarray
    b_w: np.ndarray  # a[s, t] E[c, t]
    tb_prev: np.ndarray  # traceback: predecessor known in advance (-1: read the rank)
    tb_col: np.ndarray  # for the others: back-pointer column
    p_ptr: np.ndarray  # predecessor lists by new number (increasing original index)
    p_src: np.ndarray  # their slots
    p_lp: np.ndarray
    E: np.ndarray  # (C, M) renumbered emission factors
    logE: np.ndarray  # (C, M) renumbered log emission factors
    start: np.ndarray
    end: np.ndarray
    log_start: np.ndarray
    log_end: np.ndarray  # original order (the final tie rule reads it so)
    bp_dtype: type

    @property
    def fwd(self) -> tuple[np.ndarray, ...]:
        """Arguments of a forward step: the linked moves, then the fix moves per code."""
        return (self.w1, self.f_ptr, self.f_n0, self.f_dst, self.f_src, self.f_w)

    @property
    def bwd(self) -> tuple[np.ndarray, ...]:
        """Arguments of a backward step, as :attr:`fwd`."""
        return (self.v1, self.b_ptr, self.b_n0, self.b_dst, self.b_src, self.b_w)

    @property
    def vit(self) -> tuple[np.ndarray, ...]:
        """Arguments of Viterbi before the block length."""
        head = (self.log_start, self.log_end, self.logE, self.perm, self.inv, self.la1)
        fix = (self.f_ptr, self.f_n0, self.f_dst, self.f_src, self.f_lp, self.f_rank, self.f_col)
        return (*head, *fix, self.tb_prev, self.tb_col, self.p_ptr, self.p_src, self.p_lp)


def fits(tables: EngineTables) -> bool:
    """True when ``tables`` is a model these kernels are meant for (large, mostly chains)."""
    m = tables.n_states
    if m < MIN_STATES:
        return False
    indeg = np.diff(tables.pred_ptr)
    return float(np.mean(indeg <= 1)) >= MIN_CHAIN_SHARE


def chain_order(tables: EngineTables, key: np.ndarray | None = None) -> np.ndarray:
    """New number -> original index: the allowed moves laid out as consecutive paths.

    Moves are taken greedily, best first: a move ``p -> t`` scores one point if
    ``t`` has no other predecessor and one if ``p`` has no other successor (ties:
    lower ``p``, then lower ``t``); a move is used when ``p`` has no successor in
    the layout yet, ``t`` no predecessor, and it closes no cycle.  Paths are then
    listed by their first state's original index.  With ``key`` (one integer per
    state) only moves between states of equal key are used and paths are listed
    by key first, so that the states of each key are numbered consecutively.
    """
    m = tables.n_states
    key = np.zeros(m, dtype=np.int64) if key is None else np.asarray(key, dtype=np.int64)
    indeg = np.diff(tables.pred_ptr)
    outdeg = np.diff(tables.succ_ptr)
    edges = []
    for s in range(m):
        for q in range(tables.succ_ptr[s], tables.succ_ptr[s + 1]):
            d = int(tables.succ_dst[q])
            score = int(indeg[d] == 1) + int(outdeg[s] == 1)
            if d != s and score > 0 and key[s] == key[d]:
                edges.append((-score, s, d))
    edges.sort()
    nxt = np.full(m, -1)
    prv = np.full(m, -1)
    root = list(range(m))

    def find(x):
        while root[x] != x:
            root[x] = root[root[x]]
            x = root[x]
        return x

    for _, s, d in edges:
        if nxt[s] < 0 and prv[d] < 0:
            rs, rd = find(s), find(d)
            if rs != rd:
                nxt[s], prv[d] = d, s
                root[rs] = rd
    order = []
    for s in sorted(range(m), key=lambda s: (key[s], s)):
        if prv[s] < 0:
            x = s
            while x >= 0:
                order.append(x)
                x = int(nxt[x])
    return np.array(order, dtype=np.int64)


def _per_code(dst, weights, kept):
    """Flat per-code move lists in level order (see :class:`SparseTables`).

    One entry per move of a fix state, grouped by state and, within a state, in
    the order its terms are to be combined: ``dst`` (the state's slot, equal for
    the moves of one state), ``weights`` (C, moves), the move's weight per code,
    and ``kept`` (C, moves), whether the move's target can emit the code (moves
    that cannot are left out of that code's list; a weight that merely underflows
    to 0 stays, so that Viterbi, which works in logs, loses no move).  The kept
    moves of a state are numbered 0, 1, ... (their level).
    Returns ``ptr, n0, order`` where ``order`` lists the entries code by code.
    """
    n_codes, n_moves = weights.shape
    if n_moves == 0:
        return (np.zeros(n_codes + 1, np.int64), np.zeros(n_codes, np.int64), np.zeros(0, np.int64))
    # state j of each move (moves of one state are consecutive)
    new_state = np.r_[True, dst[1:] != dst[:-1]]
    j_of = np.cumsum(new_state) - 1
    first = np.flatnonzero(new_state)
    cs = np.cumsum(kept, axis=1)
    before = np.where(first[None, :] > 0, cs[:, np.maximum(first - 1, 0)], 0)
    level = cs - before[:, j_of] - 1
    ptr = np.zeros(n_codes + 1, dtype=np.int64)
    n0 = np.zeros(n_codes, dtype=np.int64)
    parts = []
    for c in range(n_codes):
        idx = np.flatnonzero(kept[c])
        parts.append(idx[np.lexsort((j_of[idx], level[c, idx]))])
        n0[c] = int(np.count_nonzero(level[c, idx] == 0))
        ptr[c + 1] = ptr[c] + idx.size
    return ptr, n0, np.concatenate(parts)


def build(tables, key=None) -> SparseTables:
    """Renumbered tables of ``tables`` (an :class:`~seqstate.engine.tables.EngineTables`).

    ``key`` (optional, one integer per state, e.g. the posterior's output column)
    makes the states of each key consecutive (see :func:`chain_order`).
    """
    m = tables.n_states
    perm = chain_order(tables, key)
    inv = work_buffer(m, np.int64)
    inv[perm] = np.arange(m)
    pp, ps, pl, pv = tables.pred_ptr, tables.pred_src, tables.pred_logp, tables.pred_p
    sp, sd, sv = tables.succ_ptr, tables.succ_dst, tables.succ_p
    indeg = np.diff(pp)[perm]
    outdeg = np.diff(sp)[perm]
    E = np.ascontiguousarray(tables.E[:, perm])
    logE = np.ascontiguousarray(tables.logE[:, perm])
    n_codes = E.shape[0]
    # ---- forward: linked states, then the fix states' predecessor lists
    a1 = np.zeros(m)
    la1 = np.full(m, -np.inf)
    linked_f = np.zeros(m, dtype=bool)
    for t in range(1, m):
        o = perm[t]
        if indeg[t] == 1 and inv[ps[pp[o]]] == t - 1:
            linked_f[t] = True
            a1[t] = pv[pp[o]]
            la1[t] = pl[pp[o]]
    w1 = np.ascontiguousarray(a1[None, :] * E)
    fix = np.flatnonzero(~linked_f)
    multi = [int(t) for t in fix if indeg[t] > 1]
    n_multi = len(multi)
    col_of = {t: k for k, t in enumerate(multi)}
    f_dst_l, f_src_l, f_rank_l, f_p_l, f_lp_l, f_col_l = [], [], [], [], [], []
    for t in fix.tolist():
        o = perm[t]
        lo, hi = pp[o], pp[o + 1]
        f_dst_l += [t + 1] * (hi - lo)
        f_src_l += (inv[ps[lo:hi]] + 1).tolist()
        f_rank_l += list(range(hi - lo))
        f_p_l += pv[lo:hi].tolist()
        f_lp_l += pl[lo:hi].tolist()
        f_col_l += [col_of.get(int(t), n_multi)] * (hi - lo)
    f_dst_a = np.array(f_dst_l, dtype=np.int64)
    weights = np.array(f_p_l)[None, :] * E[:, f_dst_a - 1] if f_dst_l else np.zeros((n_codes, 0))
    f_ptr, f_n0, sel = _per_code(f_dst_a, weights, E[:, f_dst_a - 1] > 0)
    f_dst = f_dst_a[sel].astype(np.int32)
    f_src = np.array(f_src_l, dtype=np.int32)[sel] if f_dst_l else np.zeros(0, np.int32)
    f_w = weights[np.repeat(np.arange(n_codes), np.diff(f_ptr)), sel]
    f_lp = np.array(f_lp_l, dtype=np.float64)[sel] if f_dst_l else np.zeros(0)
    f_rank = np.array(f_rank_l, dtype=np.int32)[sel] if f_dst_l else np.zeros(0, np.int32)
    f_col = np.array(f_col_l, dtype=np.int32)[sel] if f_dst_l else np.zeros(0, np.int32)
    # ---- backward
    b1 = np.zeros(m)
    linked_b = np.zeros(m, dtype=bool)
    for s in range(m - 1):
        o = perm[s]
        if outdeg[s] == 1 and inv[sd[sp[o]]] == s + 1:
            linked_b[s] = True
            b1[s] = sv[sp[o]]
    Enext = np.concatenate([E[:, 1:], np.zeros((n_codes, 1))], axis=1)
    v1 = np.ascontiguousarray(b1[None, :] * Enext)
    b_dst_l, b_src_l, b_p_l = [], [], []
    for s in np.flatnonzero(~linked_b).tolist():
        o = perm[s]
        lo, hi = sp[o], sp[o + 1]
        order = np.argsort(inv[sd[lo:hi]], kind="stable")  # terms in increasing target
        b_dst_l += [int(s) + 1] * (hi - lo)
        b_src_l += (inv[sd[lo:hi]][order] + 1).tolist()
        b_p_l += sv[lo:hi][order].tolist()
    b_dst_a = np.array(b_dst_l, dtype=np.int64)
    b_src_a = np.array(b_src_l, dtype=np.int64)
    weights = np.array(b_p_l)[None, :] * E[:, b_src_a - 1] if b_dst_l else np.zeros((n_codes, 0))
    b_ptr, b_n0, sel = _per_code(b_dst_a, weights, E[:, b_src_a - 1] > 0)
    b_dst = b_dst_a[sel].astype(np.int32)
    b_src = b_src_a[sel].astype(np.int32)
    b_w = weights[np.repeat(np.arange(n_codes), np.diff(b_ptr)), sel]
    # ---- traceback
    tb_prev = np.full(m, -1, dtype=np.int64)
    tb_col = np.full(m, -1, dtype=np.int64)
    p_ptr = np.zeros(m + 1, dtype=np.int64)
    p_src_l, p_lp_l = [], []
    for t in range(m):
        o = perm[t]
        lo, hi = pp[o], pp[o + 1]
        p_src_l.append(inv[ps[lo:hi]] + 1)
        p_lp_l.append(pl[lo:hi])
        p_ptr[t + 1] = p_ptr[t] + (hi - lo)
        if indeg[t] == 1:
            tb_prev[t] = inv[ps[lo]]
    for t, k in col_of.items():
        tb_col[t] = k
    max_in = int(indeg.max()) if m else 0
    return SparseTables(
        n_states=m,
        perm=perm,
        inv=inv,
        w1=w1,
        la1=la1,
        f_ptr=f_ptr,
        f_n0=f_n0,
        f_dst=f_dst,
        f_src=f_src,
        f_w=f_w,
        f_lp=f_lp,
        f_rank=f_rank,
        f_col=f_col,
        n_multi=n_multi,
        v1=v1,
        b_ptr=b_ptr,
        b_n0=b_n0,
        b_dst=b_dst,
        b_src=b_src,
        b_w=b_w,
        tb_prev=tb_prev,
        tb_col=tb_col,
        p_ptr=p_ptr,
        p_src=np.concatenate(p_src_l).astype(np.int64),
        p_lp=np.concatenate(p_lp_l).astype(np.float64),
        E=E,
        logE=logE,
        start=np.ascontiguousarray(tables.start[perm]),
        end=np.ascontiguousarray(tables.end[perm]),
        log_start=np.ascontiguousarray(tables.log_start[perm]),
        log_end=np.ascontiguousarray(tables.log_end),
        bp_dtype=np.uint8 if max_in <= 256 else np.uint16 if max_in <= 65536 else np.uint32,
    )


#: Posteriors with at most this many output columns get a numbering of their own in which
#: each column's states are consecutive (see :func:`chain_order`).
MAX_KEYED_GROUPS = 16


def group_key(group: np.ndarray, n_groups: int) -> np.ndarray:
    """The renumbering key of a posterior's ``group`` array (-1, no group, sorts last)."""
    group = np.asarray(group, dtype=np.int64)
    return np.where(group < 0, n_groups, group)


def group_runs(sp: SparseTables, group: np.ndarray, n_groups: int) -> np.ndarray:
    """Maximal runs of consecutive slots of one output column: rows ``(lo, hi, column)``.

    Column ``n_groups`` (not written) stands for the states of no group, so that
    the runs cover every state (their sums add up to the posterior norm).
    """
    key = group_key(group, n_groups)[sp.perm]
    m = key.shape[0]
    starts = np.flatnonzero(np.r_[True, key[1:] != key[:-1]]) if m else np.zeros(0, np.int64)
    ends = np.r_[starts[1:], m]
    return np.ascontiguousarray(
        np.stack([starts + 1, ends + 1, key[starts]], axis=1), dtype=np.int64
    )


# ----------------------------------------------------------------- helpers
# Running vectors are rows of 2-D arrays passed with their row index: taking row
# views per position costs reference counting (see the kernels module).  Indices
# read from tables are made unsigned before indexing (no wrap-around code).
_ONE = uintp(1)


@njit(**_JIT)
def _maxbits(Ri, r, lo, hi):
    """Largest bit pattern of the non-negative doubles R[r, lo:hi] (``Ri`` an int64 view).

    For non-negative doubles the order of the bit patterns is the order of the
    values, and an integer maximum does not depend on the evaluation order, so
    the compiler may vectorise it.
    """
    mx = 0
    for i in range(lo, hi):
        mx = max(mx, Ri[r, i])
    return mx


@njit(**_JIT)
def _rescale(R, r, lo, hi, mxbits, tmpi, tmpf):
    """Multiply R[r, lo:hi] by the power of two that brings its maximum into [0.5, 1).

    Exact except for entries that stay below the normal range.  Returns the
    binary exponent e taken out: the scaled row times 2**e equals the input.
    """
    tmpi[0] = mxbits
    _, e = math.frexp(tmpf[0])
    k = -e
    while k != 0:
        step = min(max(k, -1000), 1000)
        f = math.ldexp(1.0, step)
        for s in range(lo, hi):
            R[r, s] *= f
        k -= step
    return e


@njit(**_JIT)
def _bits_of(x, tmpi, tmpf):
    tmpf[0] = x
    return tmpi[0]


@njit(**_JIT)
def _dot(F, fr, B, br, lo, hi):
    """Sum of F[fr, i] * B[br, i] for i in [lo, hi), eight interleaved partial sums."""
    s0 = s1 = s2 = s3 = s4 = s5 = s6 = s7 = 0.0
    nch = (hi - lo) // 8
    for b in range(nch):
        i = uintp(lo + 8 * b)
        s0 += F[fr, i] * B[br, i]
        s1 += F[fr, i + _ONE] * B[br, i + _ONE]
        s2 += F[fr, i + uintp(2)] * B[br, i + uintp(2)]
        s3 += F[fr, i + uintp(3)] * B[br, i + uintp(3)]
        s4 += F[fr, i + uintp(4)] * B[br, i + uintp(4)]
        s5 += F[fr, i + uintp(5)] * B[br, i + uintp(5)]
        s6 += F[fr, i + uintp(6)] * B[br, i + uintp(6)]
        s7 += F[fr, i + uintp(7)] * B[br, i + uintp(7)]
    for i in range(lo + 8 * nch, hi):
        s0 += F[fr, i] * B[br, i]
    return ((s0 + s1) + (s2 + s3)) + ((s4 + s5) + (s6 + s7))


@njit(**_JIT)
def _dot_scaled(F, fr, sf, B, br, sb, n):
    """:func:`_dot` of the rows ``F[fr] * sf`` and ``B[br] * sb`` over [0, n), same order."""
    s0 = s1 = s2 = s3 = s4 = s5 = s6 = s7 = 0.0
    nch = n // 8
    for b in range(nch):
        i = uintp(8 * b)
        s0 += (F[fr, i] * sf) * (B[br, i] * sb)
        s1 += (F[fr, i + _ONE] * sf) * (B[br, i + _ONE] * sb)
        s2 += (F[fr, i + uintp(2)] * sf) * (B[br, i + uintp(2)] * sb)
        s3 += (F[fr, i + uintp(3)] * sf) * (B[br, i + uintp(3)] * sb)
        s4 += (F[fr, i + uintp(4)] * sf) * (B[br, i + uintp(4)] * sb)
        s5 += (F[fr, i + uintp(5)] * sf) * (B[br, i + uintp(5)] * sb)
        s6 += (F[fr, i + uintp(6)] * sf) * (B[br, i + uintp(6)] * sb)
        s7 += (F[fr, i + uintp(7)] * sf) * (B[br, i + uintp(7)] * sb)
    for i in range(8 * nch, n):
        s0 += (F[fr, i] * sf) * (B[br, i] * sb)
    return ((s0 + s1) + (s2 + s3)) + ((s4 + s5) + (s6 + s7))


@njit(**_JIT)
def _step(R, xr, S, yr, c, m, shift, w1, ptr, n0, dst, src, w):
    """S[yr] = one sparse product step from R[xr] for code c (forward: shift 0, backward 2).

    Bulk: ``S[yr, t + 1] = R[xr, t + shift] * w1[c, t]``; then the fix moves.
    """
    c = uintp(c)
    for t in range(m):
        S[yr, t + 1] = R[xr, t + shift] * w1[c, t]
    lo = uintp(ptr[c])
    mid = lo + uintp(n0[c])
    hi = uintp(ptr[c + _ONE])
    for q in range(lo, mid):
        S[yr, uintp(dst[q])] = R[xr, uintp(src[q])] * w[q]
    for q in range(mid, hi):
        S[yr, uintp(dst[q])] += R[xr, uintp(src[q])] * w[q]


@njit(**_JIT)
def _first(S, yr, c, m, start, E):
    c = uintp(c)
    for t in range(m):
        S[yr, t + 1] = start[t] * E[c, t]
