"""Posteriors of a record of any length in bounded memory, from chunks of emission codes.

The whole-record posterior (:func:`seqstate.engine.api.posterior`) runs a checkpointed
forward-backward: a backward pass keeping the backward vector at each block's last
position, a forward pass keeping the forward vector at each block's first position,
and per block the posteriors from the two.  Here the same work is split so that no
array of the record's length is ever held:

* :func:`checkpoints` -- the forward pass and the backward pass (on two threads at once
  when ``threads=2``: the kernels release the GIL), reading the codes ``chunk``
  positions at a time through a :data:`CodeReader` (the backward pass from the end);
  they keep only the checkpoints (``nblocks x M``, about ``sqrt(N) x M`` values) and the
  log-likelihood;
* :func:`posterior_blocks` -- the posteriors of any run of whole blocks from those
  checkpoints and the codes of just those blocks (blocks split over two threads when
  ``threads=2``);
* :func:`view` -- an :class:`~seqstate.engine.api.Posterior` over a run of blocks, in
  local coordinates, that the segment and vector queries of the API accept.

Every number is bit-identical to the whole-record functions for the same record and
block: the kernels are those passes of each kernel family (generic, small, sparse),
with the same steps, order of operations and rescaling decisions.

Coordinates: 0-based, half-open; block ``bk`` covers positions ``[bk * block,
min(n, (bk + 1) * block))``.  Logs are natural logs.

Sparse family: the chain-sparse kernels number the states by the posterior's output
columns (when there are at most 16), and their backward pass and log-likelihood round
according to that numbering.  :func:`checkpoints` therefore takes the ``group`` the
posteriors will be asked for; checkpoints made for one ``group`` and used with another
give posteriors equal to rounding, not bit for bit.  The other families ignore it.
"""

from __future__ import annotations

import threading
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor, wait
from dataclasses import dataclass

import numpy as np
from numpy.typing import DTypeLike

from seqstate.engine import api
from seqstate.engine._common import block_of
from seqstate.engine.passes import _Generic, _Small, _Sparse, first_failure
from seqstate.engine.tables import EngineTables
from seqstate.errors import ImpossibleSequenceError

__all__ = [
    "CodeReader",
    "RecordCheckpoints",
    "block_of",
    "checkpoints",
    "posterior_blocks",
    "view",
]

CodeReader = Callable[[int, int], np.ndarray]
"""codes(a, b): emission codes of 0-based positions [a, b) of the record (as api.encode gives
for the whole record, sliced; the caller handles the order-k context).  It may be called
from two threads, never at the same time (calls are serialised here)."""

#: Default number of positions read per call of a :data:`CodeReader`.
DEFAULT_CHUNK = 1 << 20


@dataclass(frozen=True)
class RecordCheckpoints:
    """The checkpoints of one record's forward and backward passes.

    ``alpha_ck[bk]`` is the scaled forward vector at position ``bk * block`` (the block's
    first position) and ``exp(alpha_ck_log[bk])`` its scale; ``beta_ck[bk]`` the scaled
    backward vector at the block's last position ``min(n, (bk + 1) * block) - 1``.  Vectors
    are in the model's original state order.  ``key`` names the state numbering the
    sparse family used (empty for the others and for the default numbering).
    """

    n: int
    block: int
    loglik: float
    alpha_ck: np.ndarray
    alpha_ck_log: np.ndarray
    beta_ck: np.ndarray
    beta_ck_log: np.ndarray
    key: bytes = b""

    @property
    def nblocks(self) -> int:
        """Number of checkpoint blocks."""
        return (self.n + self.block - 1) // self.block

    def span_of(self, first_block: int, stop_block: int) -> tuple[int, int]:
        """Record positions ``[start0, end0)`` of blocks ``[first_block, stop_block)``."""
        return first_block * self.block, min(self.n, stop_block * self.block)


# ----------------------------------------------------------------- helpers
def _record_name(record: str | None) -> str:
    return f"record '{record}'" if record else "the record"


def _impossible_message(record: str | None, pos: int, n: int) -> str:
    """The message of :func:`api.posterior` for a record that fails at ``pos`` (as the
    generic forward pass reports it: -1 none, ``n`` at the end)."""
    name = _record_name(record)
    if pos >= n or pos < 0:
        msg = "no state that may end the sequence can be reached at its last base"
    else:
        msg = (
            f"has probability zero under the model: every state is impossible at position {pos + 1}"
        )
    return f"{name} {msg}" if pos < n else f"{name}: {msg}"


def _check_group(m: int, group: np.ndarray | None, n_groups: int | None) -> tuple[np.ndarray, int]:
    """``group``/``n_groups`` checked as :func:`api.posterior` does (per state by default)."""
    if group is None:
        return np.arange(m, dtype=np.int64), m
    group = np.asarray(group, dtype=np.int64)
    if n_groups is None:
        n_groups = int(group.max()) + 1 if group.size else 0
    if group.shape != (m,) or (m and (int(group.max()) >= n_groups or int(group.min()) < -1)):
        raise ValueError(f"group must hold one column in [-1, {n_groups}) per state")
    return group, int(n_groups)


class _Cancelled(Exception):
    """A pass stopped because the other one failed or was interrupted."""


class _Reader:
    """A :data:`CodeReader` whose calls are serialised and whose answers are checked;
    once ``stop`` is set, every call raises :class:`_Cancelled` (a pass on the other
    thread then ends at its next chunk)."""

    def __init__(self, codes: CodeReader, n: int) -> None:
        self.codes, self.n = codes, n
        self.lock = threading.Lock()
        self.stop = threading.Event()

    def __call__(self, a: int, b: int) -> np.ndarray:
        if self.stop.is_set():
            raise _Cancelled
        with self.lock:
            out = self.codes(a, b)
        out = np.asarray(out)
        if out.ndim != 1 or out.shape[0] != b - a:
            raise ValueError(
                f"the code reader gave {out.shape} codes for positions [{a}, {b}); expected {b - a}"
            )
        return out


def _threads(threads: int) -> int:
    """1 or 2 (the passes use at most two threads); ValueError below 1."""
    if int(threads) < 1:
        raise ValueError(f"threads must be at least 1, not {threads!r}")
    return min(2, int(threads))


def _family(tables: EngineTables, group: np.ndarray, n_groups: int):
    """The streaming passes of the family that serves ``tables`` now (``api.backend_of``)."""
    backend = api.backend_of(tables)
    if backend.name == "small":
        return _Small(tables, backend)
    if backend.name == "sparse":
        return _Sparse(tables, backend, group, n_groups)
    return _Generic(tables, backend)


def _forward_job(fam, read, n, block, chunk, alpha_ck, alpha_ck_log) -> tuple[float, int]:
    """The forward pass on the second thread; a failure stops the backward pass."""
    try:
        ll, pos = fam.forward(read, n, block, chunk, alpha_ck, alpha_ck_log)
    except BaseException:
        read.stop.set()
        raise
    if pos >= 0:
        read.stop.set()
    return ll, pos


def _spans(fam, codes, base, ck, group, n_groups, out, first_block, stop_block, stop) -> int:
    """``fam.span`` over blocks ``[first_block, stop_block)`` in pieces of about
    :data:`DEFAULT_CHUNK` positions, ending early once ``stop`` is set; the first
    failing position or -1."""
    step = max(1, DEFAULT_CHUNK // ck.block)
    for lo in range(first_block, stop_block, step):
        if stop is not None and stop.is_set():
            return -1
        pos = fam.span(codes, base, ck, lo, min(stop_block, lo + step), group, n_groups, out)
        if pos >= 0:
            return pos
    return -1


# ----------------------------------------------------------------- public API
def checkpoints(
    tables: EngineTables,
    n: int,
    codes: CodeReader,
    *,
    block: int | None = None,
    chunk: int = DEFAULT_CHUNK,
    threads: int = 1,
    record: str | None = None,
    group: np.ndarray | None = None,
    n_groups: int | None = None,
) -> RecordCheckpoints:
    """Forward pass (alpha at each block start, loglik) and backward pass (beta at each
    block's last position) of a record of ``n`` positions, reading ``codes`` ``chunk``
    positions at a time (the backward pass reads chunks from the end).

    ``block`` defaults to :func:`api.default_block` of ``n`` as in :func:`api.posterior`.
    ``threads >= 2`` runs the two passes at once on two threads.  ``group``/``n_groups``:
    the posterior columns to be asked of :func:`posterior_blocks` (only the sparse
    family's numbering depends on them; see the module docstring).  The arrays equal
    ``api.posterior(tables, all_codes, group=group, n_groups=n_groups, block=block)``'s
    checkpoints bit for bit.  Memory: the checkpoints plus two chunks of codes.

    Raises :class:`~seqstate.errors.ImpossibleSequenceError` naming ``record`` and the
    1-based position, with the message of :func:`api.posterior`.
    """
    n = int(n)
    if n <= 0:
        raise ValueError("empty record")
    threads = _threads(threads)
    chunk = int(chunk)
    if chunk < 1:
        raise ValueError(f"chunk must be at least 1, not {chunk}")
    m = tables.n_states
    group, n_groups = _check_group(m, group, n_groups)
    block = block_of(n, block)
    nblocks = (n + block - 1) // block
    read = _Reader(codes, n)
    fam = _family(tables, group, n_groups)
    alpha_ck, alpha_ck_log = np.zeros((nblocks, m)), np.zeros(nblocks)
    beta_ck, beta_ck_log = np.zeros((nblocks, m)), np.zeros(nblocks)
    if threads == 2:
        with ThreadPoolExecutor(max_workers=1, thread_name_prefix="seqstate-forward") as pool:
            fut = pool.submit(_forward_job, fam, read, n, block, chunk, alpha_ck, alpha_ck_log)
            try:
                bpos = fam.backward(read, n, block, chunk, beta_ck, beta_ck_log)
            except _Cancelled:
                bpos = n  # the forward pass failed first
            except BaseException:
                read.stop.set()  # the forward pass ends at its next chunk
                wait([fut])
                raise
            if bpos >= 0:
                read.stop.set()
            try:
                ll, fpos = fut.result()
            except _Cancelled:
                ll, fpos = -np.inf, n
    else:
        bpos = fam.backward(read, n, block, chunk, beta_ck, beta_ck_log)
        ll, fpos = (
            (-np.inf, 0)
            if bpos >= 0
            else fam.forward(read, n, block, chunk, alpha_ck, alpha_ck_log)
        )
    if bpos >= 0 or fpos >= 0:
        pos = first_failure(tables, _Reader(codes, n), n, chunk)
        raise ImpossibleSequenceError(_impossible_message(record, pos, n))
    key = getattr(fam, "key", b"")
    return RecordCheckpoints(n, block, float(ll), alpha_ck, alpha_ck_log, beta_ck, beta_ck_log, key)


def posterior_blocks(
    tables: EngineTables,
    ck: RecordCheckpoints,
    codes: np.ndarray,
    first_block: int,
    stop_block: int,
    group: np.ndarray | None = None,
    n_groups: int | None = None,
    dtype: DTypeLike = np.float32,
    threads: int = 1,
    *,
    record: str | None = None,
) -> np.ndarray:
    """Posterior values of blocks ``[first_block, stop_block)`` from the checkpoints.

    Rows are positions ``[first_block * block, min(n, stop_block * block))`` (row 0 is
    the first of them), columns the groups as in :func:`api.posterior` (per state when
    ``group`` is None); ``codes`` are the codes of exactly those positions.  The values
    are bit-identical to ``api.posterior(...).values`` on those rows (for the sparse
    family: when ``ck`` was made with the same ``group``, see the module docstring).
    ``threads >= 2`` splits the blocks over two threads.  Memory: the output plus O(block * M).
    """
    first_block, stop_block = int(first_block), int(stop_block)
    if not 0 <= first_block < stop_block <= ck.nblocks:
        raise ValueError(
            f"blocks [{first_block}, {stop_block}) are not a non-empty run of the "
            f"record's {ck.nblocks} blocks"
        )
    threads = _threads(threads)
    start0, end0 = ck.span_of(first_block, stop_block)
    codes = np.asarray(codes)
    if codes.ndim != 1 or codes.shape[0] != end0 - start0:
        raise ValueError(
            f"codes must hold the {end0 - start0} positions [{start0}, {end0}), not {codes.shape}"
        )
    group, n_groups = _check_group(tables.n_states, group, n_groups)
    out = np.zeros((end0 - start0, n_groups), dtype=dtype)
    fam = _family(tables, group, n_groups)
    job = (fam, codes, start0, ck, group, n_groups, out)
    if threads == 2 and stop_block - first_block >= 2:
        mid = (first_block + stop_block) // 2
        stop = threading.Event()
        with ThreadPoolExecutor(max_workers=1, thread_name_prefix="seqstate-span") as pool:
            fut = pool.submit(_spans, *job, first_block, mid, stop)
            try:
                pos2 = _spans(*job, mid, stop_block, stop)
            except BaseException:
                stop.set()  # the other thread ends at its next piece
                wait([fut])
                raise
            pos1 = fut.result()
        pos = pos1 if pos1 >= 0 else pos2
    else:
        pos = _spans(*job, first_block, stop_block, None)
    if pos >= 0:
        raise ImpossibleSequenceError(_impossible_message(record, pos, ck.n))
    return out


def view(
    tables: EngineTables,
    ck: RecordCheckpoints,
    codes: np.ndarray,
    first_block: int,
    stop_block: int,
    values: np.ndarray | None,
) -> api.Posterior:
    """An :class:`api.Posterior` over blocks ``[first_block, stop_block)`` in LOCAL
    coordinates (local 0 = record position ``first_block * block``).

    ``codes`` are the codes of those positions and ``values`` their posterior rows (or
    None: an empty array).  :func:`api.segment_log_probability`,
    :func:`api.segment_log_odds`, :func:`api.forward_vector` and
    :func:`api.backward_vector` with these ``codes`` and this view give, bit for bit,
    what they give on the whole-record Posterior with positions shifted by
    ``first_block * block``, for every segment ``[start0, end0)`` inside the span with
    local ``start0 >= 1`` or ``first_block == 0`` (a segment starting at local 0 of a
    later span would be read as starting at the record's first base: keep one margin
    block before the segments).  ``loglik`` is the record's.
    """
    first_block, stop_block = int(first_block), int(stop_block)
    if not 0 <= first_block < stop_block <= ck.nblocks:
        raise ValueError(
            f"blocks [{first_block}, {stop_block}) are not a non-empty run of the "
            f"record's {ck.nblocks} blocks"
        )
    start0, end0 = ck.span_of(first_block, stop_block)
    if np.asarray(codes).shape[0] != end0 - start0:
        raise ValueError(f"codes must hold the {end0 - start0} positions [{start0}, {end0})")
    vals = np.zeros((0, 0), dtype=np.float32) if values is None else values
    sl = slice(first_block, stop_block)
    return api.Posterior(
        ck.loglik,
        vals,
        ck.block,
        ck.alpha_ck[sl],
        ck.alpha_ck_log[sl],
        ck.beta_ck[sl],
        ck.beta_ck_log[sl],
    )
