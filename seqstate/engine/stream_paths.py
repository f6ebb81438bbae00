"""Viterbi and maximum-expected-accuracy paths of a record of any length, in pieces.

The paths come out block by block from the END of the record (traceback order), as
:class:`PathPiece` objects of at most one block each, so that a caller can turn them into
runs (:func:`runs_of`) without ever holding one state per base for the whole record.

Coordinates are 0-based half-open ``[start0, end0)``; log probabilities are natural logs.
Codes and gain rows are read through callables (``codes(a, b)`` returns the emission codes
of positions ``[a, b)``), so the record itself need not be in memory either.

Memory of :func:`viterbi_pieces`: the checkpoints (one delta row per block, O(N / block * M)
floats), one chunk of codes, one block of back-pointers, and the back-pointers of the last
positions of the record up to :data:`BACKPOINTER_BUDGET` bytes (those blocks need no second
pass: a record whose back-pointers fit is decoded in one pass, as the chain-sparse
whole-record kernel does).  Paths, log probabilities, tie rules and errors are those of
:func:`seqstate.engine.api.viterbi` and :func:`seqstate.engine.mea.mea` exactly.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass

import numpy as np

from seqstate.engine import api, mea
from seqstate.engine._common import block_of
from seqstate.engine.buffers import work_buffer
from seqstate.engine.generic import viterbi as generic_viterbi
from seqstate.engine.small import viterbi as small_viterbi
from seqstate.engine.small.backend import SmallBackend
from seqstate.engine.sparse import viterbi as sparse_viterbi
from seqstate.engine.sparse.backend import SparseBackend
from seqstate.errors import ImpossibleSequenceError

__all__ = [
    "BACKPOINTER_BUDGET",
    "CodeReader",
    "GainReader",
    "PathPiece",
    "mea_pieces",
    "runs_of",
    "viterbi_pieces",
]

#: Emission codes of the 0-based positions ``[a, b)`` of the record.
CodeReader = Callable[[int, int], np.ndarray]
#: Gain rows (float32/64, K columns) of the 0-based positions ``[a, b)`` of the record.
GainReader = Callable[[int, int], np.ndarray]

#: Bytes of back-pointers kept from the forward pass for the last blocks of a record.
BACKPOINTER_BUDGET = 64 << 20


@dataclass(frozen=True)
class PathPiece:
    """Positions [start0, end0) of the record's path: `states` (int32, one per position of the
    piece; pieces are at most one block long)."""

    start0: int
    end0: int
    states: np.ndarray


def _read(reader: Callable[[int, int], np.ndarray], a: int, b: int, what: str) -> np.ndarray:
    arr = np.ascontiguousarray(reader(a, b))
    if arr.shape[0] != b - a:
        raise ValueError(f"the {what} reader gave {arr.shape[0]} rows for [{a}, {b})")
    return arr


def _impossible(record: str | None, pos: int, n: int) -> ImpossibleSequenceError:
    """The error of :func:`seqstate.engine.api.viterbi` for a failing position (0-based)."""
    name = f"record '{record}'" if record else "the record"
    if pos >= n or pos < 0:
        msg = "no state that may end the sequence can be reached at its last base"
    else:
        msg = (
            f"has probability zero under the model: every state is impossible at position {pos + 1}"
        )
    return ImpossibleSequenceError(f"{name} {msg}" if pos < n else f"{name}: {msg}")


# ----------------------------------------------------------------- the kernel families
class _Generic:
    """The generic kernels' steps (original state numbers).

    Each family keeps its running rows, checkpoints (``ck``), one block of back-pointers
    (``bps``) and the kept back-pointers of the last positions (``tail``, from ``tail0``).
    """

    steps: tuple[np.ndarray, ...]
    bp_dtype: np.dtype
    width: int
    tail0: int
    tail: np.ndarray

    def __init__(self, t: api.EngineTables, n: int, block: int) -> None:
        m = t.n_states
        self.t = t
        self.steps = (t.logE, t.nz_ptr, t.nz_state, t.pred_ptr, t.pred_src, t.pred_logp)
        self.rows = work_buffer((2, m))
        self.carry = np.zeros(1, dtype=np.int64)
        self.ck = work_buffer(((n + block - 1) // block, m))
        self.width, self.bp_dtype = m, np.dtype(np.int32)
        self.bps = work_buffer((block, m), np.int32)

    def set_tail(self, tail0: int, rows: int) -> None:
        self.tail0 = tail0
        self.tail = work_buffer((rows, self.width), self.bp_dtype)

    def forward(self, codes: np.ndarray, i0: int, block: int) -> int:
        t = self.t
        args = (self.rows, self.carry, self.ck, self.tail, t.log_start, *self.steps)
        return generic_viterbi.forward(codes, i0, block, self.tail0, *args)

    def locate(self, fail: int, reader: CodeReader, block: int) -> int:
        return fail

    def final(self) -> tuple[float, int]:
        return generic_viterbi.final(self.rows, self.carry, self.t.log_end)

    def block_path(self, codes: np.ndarray, bk: int, known: int, nxt: int, out: np.ndarray) -> None:
        generic_viterbi.block_path(
            codes, self.ck, bk, known, nxt, self.rows, self.bps, out, *self.steps
        )

    def tail_path(self, reader: CodeReader, b0: int, b1: int, known: int, out: np.ndarray) -> int:
        return generic_viterbi.tail_path(b0, b1, self.tail0, self.tail, known, out)

    def native(self, state: int) -> int:
        return state


class _Small(_Generic):
    """The two-states-per-code steps (compact indices into each position's emitters)."""

    def __init__(self, t: api.EngineTables, n: int, block: int, backend: SmallBackend) -> None:
        sm = backend.sm
        self.t, self.sm = t, sm
        kmax = sm.kmax
        self.steps = (sm.K, sm.st, sm.wide, sm.cls, sm.LT, sm.LE, sm.logT, sm.logE)
        self.da, self.va = work_buffer(kmax), work_buffer(kmax)
        self.bpa = np.zeros(kmax, dtype=np.int8)
        self.carry = np.zeros(1, dtype=np.int64)
        self.ck = work_buffer(((n + block - 1) // block, kmax))
        self.width, self.bp_dtype = kmax, np.dtype(np.int8)
        self.bps = work_buffer((block, kmax), np.int8)

    def forward(self, codes: np.ndarray, i0: int, block: int) -> int:
        sm = self.sm
        args = (self.da, self.va, self.bpa, self.carry, self.ck, self.tail, sm.log_start)
        return small_viterbi.forward(codes, i0, block, self.tail0, *args, *self.steps)

    def final(self) -> tuple[float, int]:
        sm = self.sm
        return small_viterbi.final(self.da, self.carry, sm.K, sm.st, sm.log_end)

    def block_path(self, codes: np.ndarray, bk: int, known: int, nxt: int, out: np.ndarray) -> None:
        work = (self.da, self.va, self.bpa, self.bps, out)
        small_viterbi.block_path(codes, self.ck, bk, known, nxt, *work, *self.steps)

    def tail_path(self, reader: CodeReader, b0: int, b1: int, known: int, out: np.ndarray) -> int:
        codes = _read(reader, b0, b1, "codes")
        return small_viterbi.tail_path(codes, b0, self.tail0, self.tail, known, self.sm.st, out)


class _Sparse(_Generic):
    """The chain-sparse steps (renumbered states, slot rows of M + 2)."""

    def __init__(self, t: api.EngineTables, n: int, block: int, backend: SparseBackend) -> None:
        sp = backend.sp
        self.t, self.sp = t, sp
        m = sp.n_states
        self.fix: tuple[np.ndarray, ...] = (sp.la1, sp.logE, sp.f_ptr, sp.f_n0, sp.f_dst)
        self.fix += (sp.f_src, sp.f_lp, sp.f_rank, sp.f_col)
        self.tb = (sp.tb_prev, sp.tb_col, sp.p_ptr, sp.p_src)
        self.rows = work_buffer((2, m + 2))
        self.carry = np.zeros(1, dtype=np.int64)
        self.ck = work_buffer(((n + block - 1) // block, m + 2))
        self.width, self.bp_dtype = sp.n_multi + 1, np.dtype(sp.bp_dtype)
        self.bps = work_buffer((block, self.width), self.bp_dtype)

    def forward(self, codes: np.ndarray, i0: int, block: int) -> int:
        sp = self.sp
        args = (self.rows, self.carry, self.ck, self.tail, sp.log_start, sp.logE, *self.fix[:1])
        return sparse_viterbi.forward(codes, i0, block, self.tail0, *args, *self.fix[2:])

    def locate(self, fail: int, reader: CodeReader, block: int) -> int:
        if fail == 0:
            return 0
        k = fail // block
        while k > 0 and not np.any(self.ck[k, 1:-1] > -np.inf):
            k -= 1
        codes = _read(reader, k * block, fail + 1, "codes")
        work = work_buffer((2, self.sp.n_states + 2))
        pos = sparse_viterbi.locate(codes, k * block, self.ck[k], work, self.bps, *self.fix)
        return fail if pos < 0 else pos

    def final(self) -> tuple[float, int]:
        sp = self.sp
        return sparse_viterbi.final(self.rows, self.carry, sp.inv, sp.log_end)

    def block_path(self, codes: np.ndarray, bk: int, known: int, nxt: int, out: np.ndarray) -> None:
        sp = self.sp
        sparse_viterbi.block_path(
            codes, self.ck, bk, known, nxt, self.rows, self.bps, out, sp.perm, *self.fix,
            *self.tb, sp.p_lp,
        )  # fmt: skip

    def tail_path(self, reader: CodeReader, b0: int, b1: int, known: int, out: np.ndarray) -> int:
        sp = self.sp
        return sparse_viterbi.tail_path(
            b0, b1, self.tail0, self.tail, known, out, sp.perm, *self.tb
        )

    def native(self, state: int) -> int:
        return int(self.sp.inv[state])


def _family(tables: api.EngineTables, n: int, block: int) -> _Generic:
    """The steps of the family that serves ``tables`` now (:func:`api.backend_of`); any
    other family gets the generic steps (same paths and log probabilities)."""
    backend = api.backend_of(tables)
    if isinstance(backend, SmallBackend):
        return _Small(tables, n, block, backend)
    if isinstance(backend, SparseBackend):
        return _Sparse(tables, n, block, backend)
    return _Generic(tables, n, block)


# ----------------------------------------------------------------- Viterbi
def viterbi_pieces(
    tables: api.EngineTables,
    n: int,
    codes: CodeReader,
    *,
    block: int | None = None,
    chunk: int = 1 << 20,
    record: str | None = None,
    generic: bool = False,
    one_piece: bool = False,
) -> tuple[float, Iterator[PathPiece]]:
    """Forward max-product pass over code chunks storing checkpoints (O(nblocks*M) memory),
    returns the path's log probability (natural log) and an iterator of pieces from the LAST
    block to the FIRST (each recomputes its block's back-pointers from the checkpoint and reads
    its codes through `codes`). Concatenated (reversed) they equal api.viterbi's path exactly.
    Raises ImpossibleSequenceError as api.viterbi does.

    The last blocks whose back-pointers fit :data:`BACKPOINTER_BUDGET` keep them from the
    forward pass instead (no second pass over them).  ``chunk``: codes read per call of the
    forward pass.  The failing position of an impossible record is the first position at
    which every state's max-product score is -inf, read from this pass.  ``generic``: the
    generic family's steps whatever family serves the model (same path; for tests).
    ``one_piece`` (with ``block=None``, for callers that hold the whole path anyway, as
    :func:`api.viterbi` does): when the back-pointers of the whole record fit the budget,
    the record is one block and comes out as one piece (no per-block calls)."""
    if n <= 0:
        raise ValueError("empty record")
    if chunk < 1:
        raise ValueError(f"chunk must be a positive number of positions, got {chunk}")
    one_piece = one_piece and block is None
    block = block_of(n, block)
    nblocks = (n + block - 1) // block
    fam = _Generic(tables, n, block) if generic else _family(tables, n, block)
    if one_piece and nblocks > 1 and n * fam.width * fam.bp_dtype.itemsize <= BACKPOINTER_BUDGET:
        block, nblocks = n, 1
        fam = _Generic(tables, n, block) if generic else _family(tables, n, block)
    per_block = block * fam.width * fam.bp_dtype.itemsize
    kept = min(nblocks, BACKPOINTER_BUDGET // max(per_block, 1))
    tail0 = (nblocks - kept) * block
    fam.set_tail(tail0, max(0, n - tail0) + 1)
    a = 0
    while a < n:
        b = min(n, a + chunk)
        fail = fam.forward(_read(codes, a, b, "codes"), a, block)
        if fail >= 0:
            raise _impossible(record, fam.locate(fail, codes, block), n)
        a = b
    lp, last = fam.final()
    if last < 0:
        raise _impossible(record, n, n)
    return float(lp), _viterbi_traceback(fam, n, block, tail0, codes, int(last))


def _viterbi_traceback(
    fam: _Generic, n: int, block: int, tail0: int, codes: CodeReader, last: int
) -> Iterator[PathPiece]:
    known, nxt = last, -1
    for bk in range((n + block - 1) // block - 1, -1, -1):
        b0 = bk * block
        b1 = min(n, b0 + block)
        out = work_buffer(b1 - b0, np.int32)
        if b0 >= tail0:
            known = int(fam.tail_path(codes, b0, b1, known, out))
        else:
            fam.block_path(_read(codes, b0, b1, "codes"), bk, known, nxt, out)
            known = -1
        nxt = fam.native(int(out[0]))
        yield PathPiece(b0, b1, out)


def mea_pieces(
    tables: api.EngineTables,
    n: int,
    codes: CodeReader,
    gain: GainReader,
    state_class: np.ndarray,
    *,
    block: int | None = None,
) -> Iterator[PathPiece]:
    """MEA path (see mea.mea) in pieces from the last block to the first: the forward DP reads
    gain rows in order (in windows), keeps the score vector every `block` positions; each piece
    recomputes its block from the checkpoint, reading that block's gain again through `gain`.
    Equal to mea.mea's path exactly (same ties).

    The forward pass runs before this returns (ValueError, as mea.mea, when no allowed path
    exists); windows of :data:`seqstate.engine.mea.WINDOW` positions; the last blocks keep
    their back-pointers up to :data:`seqstate.engine.mea.BACKPOINTER_BUDGET` bytes."""
    blocks = mea.path_blocks(tables, n, codes, gain, state_class, block=block)
    return (PathPiece(b0, b1, states) for b0, b1, states in blocks)


def runs_of(pieces: Iterable[PathPiece], key: np.ndarray) -> list[tuple[int, int, int, int, int]]:
    """Maximal runs of equal key[state] over the whole path, in record order:
    (start0, end0, key, first_state, last_state). `pieces` arrive last-to-first. Memory: the runs
    only."""
    key = np.asarray(key)
    rev: list[list[int]] = []  # runs from the end of the record backwards, as mutable lists
    expect: int | None = None
    for piece in pieces:
        st = np.asarray(piece.states)
        if st.shape[0] != piece.end0 - piece.start0 or st.shape[0] == 0:
            raise ValueError(f"piece [{piece.start0}, {piece.end0}) holds {st.shape[0]} states")
        if expect is not None and piece.end0 != expect:
            raise ValueError(f"piece ends at {piece.end0}, expected {expect} (pieces last-first)")
        expect = piece.start0
        k = key[st]
        # run boundaries inside the piece: positions j where k[j] != k[j - 1]
        cut = np.flatnonzero(k[1:] != k[:-1]) + 1
        bounds = np.concatenate(([0], cut, [st.shape[0]]))
        for r in range(bounds.shape[0] - 2, -1, -1):
            a, b = int(bounds[r]), int(bounds[r + 1])
            kv = int(k[a])
            if rev and rev[-1][2] == kv and rev[-1][0] == piece.start0 + b:
                run = rev[-1]  # continues the run that starts just after this piece
                run[0] = piece.start0 + a
                run[3] = int(st[a])
            else:
                rev.append([piece.start0 + a, piece.start0 + b, kv, int(st[a]), int(st[b - 1])])
    return [(r[0], r[1], r[2], r[3], r[4]) for r in reversed(rev)]
