"""The three passes of a posterior (forward, backward, per-block combine) of each kernel
family, driven over chunks of codes: the one implementation behind both the whole-record
posterior and log-likelihood (:mod:`seqstate.engine.backends`) and the bounded-memory
streaming posterior (:mod:`seqstate.engine.stream`).

* ``forward`` -- the forward recursion, keeping the forward vector at each block's first
  position (``alpha_ck``) and giving the log-likelihood;
* ``backward`` -- the backward recursion read from the end, keeping the backward vector
  at each block's last position (``beta_ck``);
* ``span`` -- the posteriors of whole blocks from both checkpoints;
* ``posterior`` -- the whole-record posterior: the backward pass, then one forward sweep
  that writes ``alpha_ck`` and the posteriors block by block (``span`` in fill mode; no
  separate forward pass), then the log-likelihood.

Kernels: :mod:`.generic.posterior`, :mod:`.small.posterior`, :mod:`.sparse.posterior`.
Coordinates are 0-based, half-open; a failing position is returned (never raised) as
the kernels return it: -1 none, ``n`` when no state may end the record.
"""

from __future__ import annotations

from collections.abc import Iterable

import numpy as np

from seqstate.engine._common import RESCALE_BELOW
from seqstate.engine.generic import posterior as sg
from seqstate.engine.small import posterior as ss
from seqstate.engine.small import tables as small
from seqstate.engine.sparse import posterior as sst
from seqstate.engine.sparse import tables as sparse


def _whole(codes: np.ndarray):
    """A code reader over one encoded record held in memory (slices, no copies)."""
    return lambda a, b: codes[a:b]


def first_failure(tables, read, n: int, chunk: int) -> int:
    """The failing position as the whole-record API reports it (the generic forward pass
    at the default rescaling threshold: -1 none, ``n`` at the end); ``read`` a code reader."""
    fam = _Generic(tables, tables.generic)
    ck = np.zeros((1, tables.n_states)), np.zeros(1)
    _, pos = fam.forward(read, n, n, chunk, *ck, lim=RESCALE_BELOW)
    return pos


def _first_failure(positions: Iterable[int]) -> int:
    """The first failing position (>= 0) among ``positions``, consumed lazily (the passes
    over the later chunks do not run), or -1."""
    return next((p for p in positions if p >= 0), -1)


def _chunks_forward(n: int, chunk: int):
    for a in range(0, n, chunk):
        yield a, min(n, a + chunk)


def _chunks_backward(n: int, chunk: int):
    b = n
    while b > 0:
        a = max(0, b - chunk)
        yield a, b
        b = a


# ----------------------------------------------------------------- families
class _Generic:
    """The streaming passes of the generic family (:mod:`seqstate.engine.generic.posterior`)."""

    def __init__(self, tables, backend) -> None:
        self.t = tables
        self.lim = backend.lim
        self.scatter = sg.scatter_table(tables)

    def forward(self, read, n, block, chunk, alpha_ck, alpha_ck_log, lim=None):
        """Forward pass; returns (loglik, fail position or -1)."""
        t = self.t
        lim = self.lim if lim is None else lim
        rows = np.zeros((2, t.n_states))
        carry = np.zeros(1)
        icarry = np.zeros(1, dtype=np.int64)
        fwd = (t.E, t.nz_ptr, t.nz_state, t.pred_ptr, t.pred_src, t.pred_p)
        ck = (block, alpha_ck, alpha_ck_log)
        pos = _first_failure(
            sg.forward_chunk(read(a, b), a, rows, carry, icarry, *ck, t.start, *fwd, lim)
            for a, b in _chunks_forward(n, chunk)
        )
        if pos >= 0:
            return -np.inf, pos
        ll, ok = sg.forward_final(rows, icarry, carry, t.end)
        return (ll, -1) if ok else (-np.inf, n)

    def backward(self, read, n, block, chunk, beta_ck, beta_ck_log):
        """Backward pass; returns the fail position or -1."""
        t = self.t
        m = t.n_states
        rows = np.zeros((2, m))
        carry = np.zeros(1)
        icarry = np.zeros(1, dtype=np.int64)
        if not sg.backward_init(rows, carry, icarry, t.end, self.lim):
            return n
        last = (n - 1) // block
        beta_ck[last] = rows[0]
        beta_ck_log[last] = carry[0]
        w = np.zeros(m)
        moves = (t.E, t.nz_ptr, t.nz_state, t.pred_ptr, t.pred_src, t.pred_p)
        moves += (t.succ_ptr, t.succ_dst, t.succ_p)
        cks = (block, beta_ck, beta_ck_log, self.scatter)
        return _first_failure(
            sg.backward_chunk(read(a, b), a, b - 1, rows, carry, icarry, *cks, *moves, w, self.lim)
            for a, b in _chunks_backward(n, chunk)
        )

    def span(self, codes, base, ck, first_block, stop_block, group, n_groups, out):
        """Posteriors of blocks ``[first_block, stop_block)`` into ``out`` (zero), whose
        row 0 and ``codes[0]`` are record position ``base``."""
        cks = (ck.alpha_ck, ck.alpha_ck_log, ck.beta_ck)
        blocks = (first_block, stop_block)
        return self._span(codes, base, ck.n, ck.block, cks, blocks, group, n_groups, out)

    def posterior(self, codes, block, group, n_groups, out, ck) -> tuple[float, int]:
        """The whole-record posterior into ``out`` (zero) and the checkpoints ``ck``
        (alpha, alpha log, beta, beta log); (log-likelihood, fail position or -1)."""
        n = codes.shape[0]
        pos = self.backward(_whole(codes), n, block, n, ck[2], ck[3])
        if pos >= 0:
            return -np.inf, pos
        nb = (n + block - 1) // block
        pos = self._span(codes, 0, n, block, ck[:3], (0, nb), group, n_groups, out, True)
        if pos >= 0:
            return -np.inf, pos
        ll, ok = self.final()
        return (ll, -1) if ok else (-np.inf, n)

    def loglik(self, codes) -> tuple[float, int]:
        """(log-likelihood, fail position or -1): the forward pass of one record."""
        n = codes.shape[0]
        return self.forward(_whole(codes), n, n, n, np.zeros((1, self.t.n_states)), np.zeros(1))

    def _span(self, codes, base, n, block, cks, blocks, group, n_groups, out, fill=False):
        """``cks``: (alpha_ck, alpha_ck_log, beta_ck); ``blocks``: (first, stop)."""
        alpha_ck, alpha_ck_log, beta_ck = cks
        first_block, stop_block = blocks
        t = self.t
        m = t.n_states
        scratch = sg.span_scratch(m, min(block, n))
        moves = (t.E, t.nz_ptr, t.nz_state, t.pred_ptr, t.pred_src, t.pred_p)
        moves += (t.succ_ptr, t.succ_dst, t.succ_p)
        self.carry, self.icarry = np.zeros(1), np.zeros(1, dtype=np.int64)
        self.fw = scratch[3]
        return sg.span(
            codes, base, n, first_block, stop_block, block, *moves, self.scatter, group, out,
            alpha_ck, beta_ck, *scratch, self.lim, fill, t.start, alpha_ck_log, self.carry,
            self.icarry,
        )  # fmt: skip

    def final(self) -> tuple[float, bool]:
        """(log-likelihood, ok) after a span in fill mode."""
        return sg.forward_final(self.fw, self.icarry, self.carry, self.t.end)


class _Small(_Generic):
    """The streaming passes of the two-state-per-code family (:mod:`.small.posterior`)."""

    def __init__(self, tables, backend) -> None:
        self.t = tables
        sm = self.sm = backend.sm
        self.lim = sm.lim
        self.steps = (sm.K, sm.st, sm.wide, sm.cls, sm.W, sm.T, sm.E)

    def forward(self, read, n, block, chunk, alpha_ck, alpha_ck_log):
        sm = self.sm
        kmax = sm.kmax
        ua, va = np.zeros(kmax), np.zeros(kmax)
        fc = np.zeros(3)
        ic = np.zeros(1, dtype=np.int64)
        cks = (block, alpha_ck, alpha_ck_log, sm.start)
        pos = _first_failure(
            ss.forward_chunk(read(a, b), a, ua, va, fc, ic, *cks, *self.steps, self.lim)
            for a, b in _chunks_forward(n, chunk)
        )
        if pos >= 0:
            return -np.inf, pos
        ll, ok = ss.forward_final(ua, fc, ic, sm.K, sm.st, sm.wide, sm.end)
        return (ll, -1) if ok else (-np.inf, n)

    def backward(self, read, n, block, chunk, beta_ck, beta_ck_log):
        sm = self.sm
        kmax = sm.kmax
        full = np.zeros(self.t.n_states)
        ba, bb = np.zeros(kmax), np.zeros(kmax)
        fc = np.zeros(3)
        ic = np.zeros(1, dtype=np.int64)
        work = (full, ba, bb, fc, ic)
        cks = (block, beta_ck, beta_ck_log, sm.end)
        return _first_failure(
            ss.backward_chunk(read(a, b), a, b, n, *work, *cks, *self.steps, self.lim)
            for a, b in _chunks_backward(n, chunk)
        )

    def _span(self, codes, base, n, block, cks, blocks, group, n_groups, out, fill=False):
        alpha_ck, alpha_ck_log, beta_ck = cks
        first_block, stop_block = blocks
        sm = self.sm
        gc = small.group_table(sm, group)
        scratch = ss.span_scratch(sm.kmax, min(block, n))
        self.ua = scratch[3]
        self.fc, self.ic = np.zeros(3), np.zeros(1, dtype=np.int64)
        return ss.span(
            codes, base, n, first_block, stop_block, block, *self.steps, gc, out,
            alpha_ck, beta_ck, *scratch, self.lim, fill, sm.start, alpha_ck_log, self.fc, self.ic,
        )  # fmt: skip

    def final(self) -> tuple[float, bool]:
        sm = self.sm
        return ss.forward_final(self.ua, self.fc, self.ic, sm.K, sm.st, sm.wide, sm.end)


class _Sparse(_Generic):
    """The streaming passes of the chain-sparse family (:mod:`.sparse.posterior`), in the
    numbering the whole-record posterior uses for ``group``."""

    def __init__(self, tables, backend, group, n_groups) -> None:
        self.t = tables
        self.lim = backend.lim
        if n_groups <= sparse.MAX_KEYED_GROUPS:
            self.sp = backend.keyed(group, n_groups)
            self.key = sparse.group_key(group, n_groups).tobytes()
        else:
            self.sp, self.key = backend.sp, b""

    def forward(self, read, n, block, chunk, alpha_ck, alpha_ck_log):
        sp = self.sp
        rows = np.zeros((2, sp.n_states + 2))
        ic = np.zeros(2, dtype=np.int64)
        cks = (block, alpha_ck, alpha_ck_log, sp.start, sp.E, sp.perm)
        pos = _first_failure(
            sst.forward_chunk(read(a, b), a, rows, ic, *cks, *sp.fwd, self.lim)
            for a, b in _chunks_forward(n, chunk)
        )
        if pos >= 0:
            return -np.inf, pos
        ll, ok = sst.forward_final(rows, ic, sp.end)
        return (ll, -1) if ok else (-np.inf, n)

    def backward(self, read, n, block, chunk, beta_ck, beta_ck_log):
        sp = self.sp
        rows = np.zeros((2, sp.n_states + 2))
        ic = np.zeros(2, dtype=np.int64)
        if not sst.backward_init(rows, ic, sp.end, sp.perm, beta_ck, beta_ck_log, self.lim):
            return n
        cks = (block, beta_ck, beta_ck_log, sp.perm)
        return _first_failure(
            sst.backward_chunk(read(a, b), a, b - 1, rows, ic, *cks, *sp.bwd, self.lim)
            for a, b in _chunks_backward(n, chunk)
        )

    def _span(self, codes, base, n, block, cks, blocks, group, n_groups, out, fill=False):
        alpha_ck, alpha_ck_log, beta_ck = cks
        first_block, stop_block = blocks
        sp = self.sp
        runs = sparse.group_runs(sp, group, n_groups)
        scratch = sst.span_scratch(sp.n_states, min(block, n), n_groups)
        self.fwd, self.ic = scratch[1], np.zeros(2, dtype=np.int64)
        return sst.span(
            codes, base, n, first_block, stop_block, block, sp.perm, *sp.fwd, *sp.bwd,
            runs, n_groups, out, alpha_ck, beta_ck, *scratch, self.lim, fill, sp.start, sp.E,
            alpha_ck_log, self.ic,
        )  # fmt: skip

    def final(self) -> tuple[float, bool]:
        return sst.forward_final(self.fwd, self.ic, self.sp.end)
