"""Maximum expected accuracy path over a model's allowed moves ("posterior Viterbi").

Given per-position posteriors of state classes (from the checkpointed
forward-backward), find the state path that maximises the sum over positions of
the posterior of the class of the state it is in, among the paths the model
allows: a start of non-zero probability, allowed moves only, a non-zero emission
factor at every position, and an end of non-zero probability (when the model has
an end table).  The result is a path of positive probability whose expected
number of bases in the right class is the largest.

Memory: the score vector is checkpointed every ``block`` positions and each block
is recomputed once during the traceback, so memory is O(M * (N / block + block)).
Ties go to the lowest predecessor index at every step and to the lowest state
index at the end, as in Viterbi.  Arrays in, arrays out; nothing here prints.
"""

from __future__ import annotations

import math

import numba as nb
import numpy as np

NEG = -math.inf


@nb.njit(cache=True)
def _step(prev, cur, bp, t, codes, gain, cls, E, p_ptr, p_src, m):
    c = codes[t]
    any_ok = False
    for j in range(m):
        best = NEG
        arg = -1
        if E[c, j] > 0.0:
            for q in range(p_ptr[j], p_ptr[j + 1]):
                i = p_src[q]
                v = prev[i]
                if v > best:
                    best = v
                    arg = i
        if arg >= 0:
            cur[j] = best + gain[t, cls[j]]
            any_ok = True
        else:
            cur[j] = NEG
        bp[j] = arg
    return any_ok


@nb.njit(cache=True)
def _first(cur, codes, gain, cls, E, start_ok, m):
    c = codes[0]
    any_ok = False
    for j in range(m):
        if start_ok[j] and E[c, j] > 0.0:
            cur[j] = gain[0, cls[j]]
            any_ok = True
        else:
            cur[j] = NEG
    return any_ok


@nb.njit(cache=True)
def mea_path(codes, gain, cls, E, start_ok, end_ok, p_ptr, p_src, block, path):
    """Fill ``path`` (length N) with the best path; return (total gain, failed position).

    ``gain[t, k]``: posterior of class k at position t; ``cls[j]``: class of state j;
    ``E[code, j]``: emission factor; ``p_ptr``/``p_src``: predecessors of each state
    (CSR, sources in increasing index).  The failed position is -1 on success, else
    the first position no allowed path reaches (the path is then left unfilled).
    """
    n = codes.shape[0]
    m = cls.shape[0]
    nblocks = (n + block - 1) // block
    ck = np.zeros((nblocks, m))
    cur = np.zeros(m)
    prev = np.zeros(m)
    bp_row = np.zeros(m, dtype=np.int64)
    if not _first(cur, codes, gain, cls, E, start_ok, m):
        return NEG, 0
    ck[0, :] = cur
    for t in range(1, n):
        prev[:] = cur
        if not _step(prev, cur, bp_row, t, codes, gain, cls, E, p_ptr, p_src, m):
            return NEG, t
        if t % block == 0:
            ck[t // block, :] = cur
    best = NEG
    last = -1
    for j in range(m):
        if end_ok[j] and cur[j] > best:
            best = cur[j]
            last = j
    if last < 0:
        return NEG, n - 1
    bps = np.zeros((block, m), dtype=np.int64)
    state = last
    hi = n - 1  # path[hi] is ``state``, not yet written
    for b in range(nblocks - 1, -1, -1):
        t0 = b * block
        cur[:] = ck[b, :]
        for t in range(t0 + 1, hi + 1):
            prev[:] = cur
            _step(prev, cur, bp_row, t, codes, gain, cls, E, p_ptr, p_src, m)
            bps[t - t0 - 1, :] = bp_row
        for t in range(hi, t0, -1):
            path[t] = state
            state = bps[t - t0 - 1, state]
        hi = t0
    path[0] = state
    return best, -1


def predecessors(transitions: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """CSR predecessor lists of the allowed moves (sources in increasing index)."""
    allowed = np.asarray(transitions) > 0
    m = allowed.shape[0]
    ptr = np.zeros(m + 1, dtype=np.int64)
    src = []
    for j in range(m):
        s = np.flatnonzero(allowed[:, j])
        src.extend(s.tolist())
        ptr[j + 1] = len(src)
    return ptr, np.asarray(src, dtype=np.int64)


def mea(
    tables,
    codes: np.ndarray,
    gain: np.ndarray,
    state_class: np.ndarray,
    *,
    block: int | None = None,
) -> np.ndarray:
    """Maximum expected accuracy path of one encoded record (int32 state indices).

    ``tables``: :class:`seqstate.engine.api.EngineTables`; ``gain[t, k]``: the
    posterior of class k at 0-based position t (N x K, e.g. from
    ``api.posterior(group=state_class)``); ``state_class[j]``: the class of state j.
    Raises ValueError when no allowed path exists (the posterior run fails first on
    such a record).
    """
    from seqstate.engine.api import default_block

    n = codes.shape[0]
    if n == 0:
        raise ValueError("empty record")
    block = default_block(n) if block is None else max(1, min(int(block), n))
    ptr, src = predecessors(tables.transitions)
    path = np.zeros(n, dtype=np.int32)
    _, failed = mea_path(
        np.ascontiguousarray(codes),
        np.ascontiguousarray(gain),
        np.ascontiguousarray(state_class, dtype=np.int64),
        tables.E,
        np.asarray(tables.start) > 0,
        np.asarray(tables.end) > 0,
        ptr,
        src,
        block,
        path,
    )
    if failed >= 0:
        raise ValueError(f"no allowed path reaches position {failed + 1}")
    return path
