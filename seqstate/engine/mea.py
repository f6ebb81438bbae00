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

One implementation (:func:`mea_reference`, plain NumPy, is its oracle in the tests): the
streaming kernels (:func:`stream_forward`, :func:`stream_block_path`,
:func:`stream_tail_path`) driven by :func:`path_blocks`: codes and gain rows are read
through callables in windows, the score row is checkpointed every ``block`` positions, and
the path comes out block by block from the end.  A state with one predecessor needs no
search and no back-pointer; the others store the rank of the winner in their predecessor
list (one byte), so the back-pointers of the last positions of a record can be kept from
the forward pass (up to a budget) and those blocks need no second pass.
:func:`mea` runs them over a record held in memory.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterator

import numpy as np

from seqstate.engine.buffers import work_buffer
from seqstate.engine.generic.mea import (
    stream_block_path,
    stream_final,
    stream_forward,
    stream_tail_path,
)

NEG = -math.inf
#: Positions of codes and gain rows read at a time by the forward pass of :func:`path_blocks`.
WINDOW = 1 << 16
#: Bytes of back-pointers kept from the forward pass for the last blocks of a record.
BACKPOINTER_BUDGET = 64 << 20


# ----------------------------------------------------------------- streaming kernels
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
    n = codes.shape[0]
    if n == 0:
        raise ValueError("empty record")
    path = np.zeros(n, dtype=np.int32)
    for b0, b1, states in path_blocks(
        tables, n, lambda a, b: codes[a:b], lambda a, b: gain[a:b], state_class, block=block
    ):
        path[b0:b1] = states
    return path


def mea_reference(
    codes: np.ndarray,
    gain: np.ndarray,
    state_class: np.ndarray,
    E: np.ndarray,
    transitions: np.ndarray,
    start: np.ndarray,
    end: np.ndarray,
) -> tuple[np.ndarray, float]:
    """Plain-NumPy twin of the kernels (full N x M tables; small inputs only): (path, gain).

    Same rule: start > 0, allowed moves, E > 0 at every position, end > 0; the lowest
    predecessor index wins ties (``argmax`` takes the first maximum), and the lowest final
    state.  Raises ValueError as :func:`mea` does.
    """
    n = codes.shape[0]
    m = state_class.shape[0]
    allowed = np.asarray(transitions) > 0
    ok = np.asarray(E)[codes] > 0  # (N, M)
    g = np.asarray(gain)[:, state_class].astype(np.float64)
    score = np.full((n, m), NEG)
    bp = np.zeros((n, m), dtype=np.int64)
    first = (np.asarray(start) > 0) & ok[0]
    score[0, first] = g[0, first]
    if not first.any():
        raise ValueError("no allowed path reaches position 1")
    for i in range(1, n):
        cand = np.where(allowed, score[i - 1][:, None], NEG)  # cand[p, t]
        best = cand.max(axis=0)
        arg = cand.argmax(axis=0)
        reach = ok[i] & (best > NEG)
        score[i, reach] = best[reach] + g[i, reach]
        bp[i] = arg
        if not reach.any():
            raise ValueError(f"no allowed path reaches position {i + 1}")
    final = np.where(np.asarray(end) > 0, score[-1], NEG)
    if not (final > NEG).any():
        raise ValueError(f"no allowed path reaches position {n}")
    path = np.zeros(n, dtype=np.int32)
    path[-1] = int(np.argmax(final))
    for i in range(n - 1, 0, -1):
        path[i - 1] = bp[i, path[i]]
    return path, float(final.max())


class Stream:
    """One record's MEA forward pass: checkpoints, kept ranks and the final state; then
    :meth:`blocks` traces the path from the end (see :func:`path_blocks`)."""

    def __init__(
        self,
        tables,
        n: int,
        codes: Callable[[int, int], np.ndarray],
        gain: Callable[[int, int], np.ndarray],
        state_class: np.ndarray,
        block: int,
        window: int | None = None,
        budget: int | None = None,
    ) -> None:
        window = WINDOW if window is None else window
        budget = BACKPOINTER_BUDGET if budget is None else budget
        m = tables.n_states
        self.n, self.block, self.codes, self.gain = n, block, codes, gain
        self.p_ptr, self.p_src = predecessors(tables.transitions)
        indeg = np.diff(self.p_ptr)
        multi = np.flatnonzero(indeg > 1)
        self.col = np.full(m, multi.shape[0], dtype=np.int64)
        self.col[multi] = np.arange(multi.shape[0])
        top = int(indeg.max()) if m else 0
        dt = np.uint8 if top <= 256 else np.uint16 if top <= 65536 else np.uint32
        width = multi.shape[0] + 1
        self.cls = np.ascontiguousarray(state_class, dtype=np.int64)
        self.emit = np.ascontiguousarray(np.asarray(tables.E) > 0).view(np.uint8)
        start_ok = np.ascontiguousarray(np.asarray(tables.start) > 0)
        self.end_ok = np.ascontiguousarray(np.asarray(tables.end) > 0)
        nblocks = (n + block - 1) // block
        self.rows = work_buffer((2, m))
        self.carry = np.zeros(1, dtype=np.int64)
        self.ck = work_buffer((nblocks, m))
        kept = min(nblocks, budget // max(1, block * width * np.dtype(dt).itemsize))
        self.tail0 = (nblocks - kept) * block
        self.tail = work_buffer((max(0, n - self.tail0) + 1, width), dt)
        self.bps = work_buffer((block, width), dt)
        moves = (self.p_ptr, self.p_src, self.col)
        a = 0
        self.failed = -1
        while a < n:
            b = min(n, a + window)
            fail = stream_forward(
                _rows(codes, a, b, "codes"), _rows(gain, a, b, "gain"), a, block, self.tail0,
                self.rows, self.carry, self.ck, self.tail, self.cls, self.emit, start_ok, *moves,
            )  # fmt: skip
            if fail >= 0:
                self.failed = int(fail)
                return
            a = b
        self.total, last = stream_final(self.rows, self.carry, self.end_ok)
        self.last = int(last)
        if self.last < 0:
            self.failed = n - 1

    def check(self) -> None:
        """Raise ValueError (the message of :func:`mea`) when no allowed path exists."""
        if self.failed >= 0:
            raise ValueError(f"no allowed path reaches position {self.failed + 1}")

    def blocks(self) -> Iterator[tuple[int, int, np.ndarray]]:
        """``(b0, b1, states)`` of every block from the last to the first (int32 states)."""
        self.check()
        n, block = self.n, self.block
        moves = (self.p_ptr, self.p_src, self.col)
        known, nxt = self.last, -1
        for bk in range((n + block - 1) // block - 1, -1, -1):
            b0 = bk * block
            b1 = min(n, b0 + block)
            out = work_buffer(b1 - b0, np.int32)
            if b0 >= self.tail0:
                known = int(stream_tail_path(b0, b1, self.tail0, self.tail, known, out, *moves))
            else:
                codes = _rows(self.codes, b0, b1, "codes")
                gain = _rows(self.gain, b0, b1, "gain")
                stream_block_path(
                    codes, gain, self.ck, bk, known, nxt, self.rows, self.bps, out, self.cls,
                    self.emit, *moves,
                )  # fmt: skip
                known = -1
            nxt = int(out[0])
            yield b0, b1, out


class SlotStream(Stream):
    """:class:`Stream` in the renumbered slots of the chain-sparse family
    (:mod:`seqstate.engine.sparse.mea`): the same path, fewer operations per base."""

    def __init__(
        self,
        tables,
        sp,
        n: int,
        codes: Callable[[int, int], np.ndarray],
        gain: Callable[[int, int], np.ndarray],
        state_class: np.ndarray,
        block: int,
        window: int | None = None,
        budget: int | None = None,
    ) -> None:
        from seqstate.engine.sparse import mea as mea_sparse

        window = WINDOW if window is None else window
        budget = BACKPOINTER_BUDGET if budget is None else budget
        m = tables.n_states
        self.sp = sp
        self.n, self.block, self.codes, self.gain = n, block, codes, gain
        self.cls = np.ascontiguousarray(state_class, dtype=np.int64)
        emit = np.ascontiguousarray(np.asarray(tables.E) > 0).view(np.uint8)
        start_ok = np.ascontiguousarray(np.asarray(tables.start) > 0)
        end_ok = np.ascontiguousarray(np.asarray(tables.end) > 0)
        lin = np.where(sp.la1 > NEG, 0.0, NEG)
        emadd = np.ascontiguousarray(np.where(sp.E > 0, 0.0, NEG))
        clsp = np.ascontiguousarray(self.cls[sp.perm])
        self.step: tuple[np.ndarray, ...] = (lin, emadd, clsp, sp.f_ptr, sp.f_n0, sp.f_dst)
        self.step += (sp.f_src, sp.f_rank, sp.f_col)
        self.tb = (sp.tb_prev, sp.tb_col, sp.p_ptr, sp.p_src)
        self.ge = work_buffer(m)
        nblocks = (n + block - 1) // block
        width = sp.n_multi + 1
        dt = np.dtype(sp.bp_dtype)
        self.rows = work_buffer((2, m + 2))
        self.carry = np.zeros(1, dtype=np.int64)
        self.ck = work_buffer((nblocks, m + 2))
        kept = min(nblocks, budget // max(1, block * width * dt.itemsize))
        self.tail0 = (nblocks - kept) * block
        self.tail = work_buffer((max(0, n - self.tail0) + 1, width), dt)
        self.bps = work_buffer((block, width), dt)
        a = 0
        self.failed = -1
        while a < n:
            b = min(n, a + window)
            fail = mea_sparse.slot_forward(
                _rows(codes, a, b, "codes"), _rows(gain, a, b, "gain"), a, block, self.tail0,
                self.rows, self.carry, self.ck, self.tail, self.ge, sp.inv, self.cls, emit,
                start_ok, *self.step,
            )  # fmt: skip
            if fail >= 0:
                self.failed = self._locate(int(fail))
                return
            a = b
        self.total, last = mea_sparse.slot_final(self.rows, self.carry, sp.inv, end_ok)
        self.last = int(last)
        if self.last < 0:
            self.failed = n - 1

    def _locate(self, fail: int) -> int:
        from seqstate.engine.sparse import mea as mea_sparse

        if fail == 0:
            return 0
        k = fail // self.block
        while k > 0 and not np.any(self.ck[k, 1:-1] > NEG):
            k -= 1
        a = k * self.block
        codes = _rows(self.codes, a, fail + 1, "codes")
        gain = _rows(self.gain, a, fail + 1, "gain")
        work = work_buffer((2, self.sp.n_states + 2))
        pos = mea_sparse.slot_locate(
            codes, gain, a, self.ck[k], work, self.bps, self.ge, *self.step
        )
        return fail if pos < 0 else int(pos)

    def blocks(self) -> Iterator[tuple[int, int, np.ndarray]]:
        from seqstate.engine.sparse import mea as mea_sparse
        from seqstate.engine.sparse import viterbi as sparse_viterbi

        self.check()
        n, block, sp = self.n, self.block, self.sp
        known, nxt = self.last, -1
        for bk in range((n + block - 1) // block - 1, -1, -1):
            b0 = bk * block
            b1 = min(n, b0 + block)
            out = work_buffer(b1 - b0, np.int32)
            if b0 >= self.tail0:
                known = int(
                    sparse_viterbi.tail_path(
                        b0, b1, self.tail0, self.tail, known, out, sp.perm, *self.tb
                    )
                )
            else:
                codes = _rows(self.codes, b0, b1, "codes")
                gain = _rows(self.gain, b0, b1, "gain")
                mea_sparse.slot_block_path(
                    codes, gain, self.ck, bk, known, nxt, self.rows, self.bps, out, self.ge,
                    sp.perm, *self.step, *self.tb,
                )  # fmt: skip
                known = -1
            nxt = int(sp.inv[int(out[0])])
            yield b0, b1, out


def _rows(reader: Callable[[int, int], np.ndarray], a: int, b: int, what: str) -> np.ndarray:
    arr = np.ascontiguousarray(reader(a, b))
    if arr.shape[0] != b - a:
        raise ValueError(f"the {what} reader gave {arr.shape[0]} rows for [{a}, {b})")
    return arr


def path_blocks(
    tables,
    n: int,
    codes: Callable[[int, int], np.ndarray],
    gain: Callable[[int, int], np.ndarray],
    state_class: np.ndarray,
    *,
    block: int | None = None,
) -> Iterator[tuple[int, int, np.ndarray]]:
    """The MEA path of a record of ``n`` positions as ``(b0, b1, states)`` blocks, from the last
    block to the first (0-based half-open; int32 states).  ``codes(a, b)`` and ``gain(a, b)``
    give the codes and gain rows of ``[a, b)``.  The forward pass runs (and raises ValueError
    when no allowed path exists) before this returns."""
    from seqstate.engine.api import default_block

    if n <= 0:
        raise ValueError("empty record")
    from seqstate.engine.api import backend_of
    from seqstate.engine.sparse.backend import SparseBackend

    block = default_block(n) if block is None else max(1, min(int(block), n))
    backend = backend_of(tables)
    stream: Stream
    if isinstance(backend, SparseBackend):
        stream = SlotStream(tables, backend.sp, n, codes, gain, state_class, block)
    else:
        stream = Stream(tables, n, codes, gain, state_class, block)
    stream.check()
    return stream.blocks()
