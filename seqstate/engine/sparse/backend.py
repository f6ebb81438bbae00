"""The chain-sparse kernel family: large models made mostly of chains (see engine.sparse)."""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

import numpy as np

from seqstate.engine import passes
from seqstate.engine._common import LN2
from seqstate.engine.buffers import work_buffer
from seqstate.engine.generic.backend import Array, GenericBackend
from seqstate.engine.generic.queries import one_class
from seqstate.engine.sparse import queries as sparse_query
from seqstate.engine.sparse import tables as sparse

if TYPE_CHECKING:
    from seqstate.engine.api import Posterior
    from seqstate.engine.tables import EngineTables

#: Renumbered tables kept per distinct posterior grouping (a few at most in practice).
MAX_KEYED_TABLES = 16


class SparseBackend(GenericBackend):
    """Every query in the renumbered slots of :mod:`seqstate.engine.sparse`."""

    name = "sparse"

    def __init__(self, tables: EngineTables) -> None:
        super().__init__(tables)
        self.sp = sparse.build(tables)
        self._keyed: dict[bytes, sparse.SparseTables] = {}

    @classmethod
    def fitting(cls, tables: EngineTables) -> SparseBackend | None:
        """The backend of ``tables``, or None when the model does not fit these kernels."""
        return cls(tables) if sparse.fits(tables) else None

    def keyed(self, group: np.ndarray, n_groups: int) -> sparse.SparseTables:
        """Tables numbered so that each of the ``n_groups`` columns' states are consecutive
        (the per-column sums then read contiguous ranges); kept per distinct ``group``."""
        key = sparse.group_key(group, n_groups)
        name = key.tobytes()
        sp = self._keyed.get(name)
        if sp is None:
            if len(self._keyed) > MAX_KEYED_TABLES:
                self._keyed.clear()
            sp = self._keyed[name] = sparse.build(self.t, key)
        return sp

    # ------------------------------------------------------------- whole-record passes
    def passes_for(self, group: Array | None = None, n_groups: int = 0) -> passes._Generic:
        if group is None:  # the default numbering (more columns than are ever keyed)
            group, n_groups = np.arange(self.t.n_states), sparse.MAX_KEYED_GROUPS + 1
        return passes._Sparse(self.t, self, group, n_groups)

    # ------------------------------------------------------------- vectors and segments
    def cursor(self, codes: np.ndarray, post: Posterior) -> Cursor:
        """The query state of ``post`` (kept on it while it serves the same record)."""
        cur = post.cursor
        if not (isinstance(cur, Cursor) and cur.serves(self, codes, post)):
            cur = Cursor(self, codes, post)
            post.cursor = cur
        return cur

    def forward_vector(self, codes: Array, post: Posterior, pos: int) -> tuple[Array, float]:
        return self._unslot(*self.cursor(codes, post).forward(pos))

    def backward_vector(self, codes: Array, post: Posterior, pos: int) -> tuple[Array, float]:
        return self._unslot(*self.cursor(codes, post).backward(pos))

    def _unslot(self, row: Array, lg: float) -> tuple[Array, float]:
        out = work_buffer(self.t.n_states)
        sparse_query.from_slots(row, 0, self.sp.perm, out)
        return out, lg

    def mask_slots(self, mask: np.ndarray) -> np.ndarray:
        """``mask`` (original order) as 0/1 factors per slot (dummy slots 0)."""
        return self.allowed_slots(np.asarray(mask, dtype=np.bool_).reshape(1, -1))[0]

    def allowed_slots(self, allowed: np.ndarray) -> np.ndarray:
        """``allowed`` (K x M, original order) as 0/1 factors per slot, K x (M + 2)
        (dummy slots 0)."""
        allowed = np.asarray(allowed, dtype=np.bool_)
        out = np.zeros((allowed.shape[0], self.sp.n_states + 2))
        out[:, 1:-1] = allowed[:, self.sp.perm]
        return out

    def constrained_slots(
        self,
        codes: np.ndarray,
        start0: int,
        end0: int,
        init: np.ndarray,
        init_is_start: bool,
        cls: np.ndarray,
        allowedf: np.ndarray,
        use_emissions: bool,
        work: np.ndarray,
    ) -> float:
        """Constrained forward in slots (result in row 0 of ``work``); natural-log scale
        or -inf.  ``init`` is a slot row (ignored when ``init_is_start``), ``allowedf``
        as :meth:`allowed_slots` gives it."""
        sp = self.sp
        skip = -1 if use_emissions else self.t.unknown_code
        query = (codes, start0, end0, init, init_is_start, cls, allowedf, skip)
        ex = sparse_query.constrained_forward(*query, sp.start, sp.E, *sp.fwd, self.lim, work)
        return ex if ex == -np.inf else ex * LN2

    def restricted_slots(
        self,
        codes: np.ndarray,
        start0: int,
        end0: int,
        init: np.ndarray,
        init_is_start: bool,
        maskf: np.ndarray,
        use_emissions: bool,
        work: np.ndarray,
    ) -> float:
        """:meth:`constrained_slots` with one allowed set, ``maskf`` (M + 2 factors)."""
        cls, _ = one_class(start0, end0, maskf)
        allowedf = np.asarray(maskf, dtype=np.float64).reshape(1, -1)
        query = (codes, start0, end0, init, init_is_start, cls, allowedf, use_emissions)
        return self.constrained_slots(*query, work)

    def constrained(
        self,
        codes: np.ndarray,
        start0: int,
        end0: int,
        init: np.ndarray,
        init_is_start: bool,
        cls: np.ndarray,
        allowed: np.ndarray,
        use_emissions: bool,
    ) -> tuple[np.ndarray, float]:
        m = self.t.n_states
        row = np.zeros((1, m + 2))
        if not init_is_start:
            sparse_query.to_slots(np.asarray(init, dtype=np.float64), self.sp.perm, row, 0)
        work = work_buffer((2, m + 2))
        allowedf = self.allowed_slots(allowed)
        query = (codes, start0, end0, row, init_is_start, cls, allowedf, use_emissions)
        lg = self.constrained_slots(*query, work)
        out = np.zeros(m)
        if lg > -np.inf:
            sparse_query.from_slots(work, 0, self.sp.perm, out)
        return out, lg

    def _slot_before(self, cur: Cursor, start0: int) -> tuple[np.ndarray, float, bool]:
        if start0 == 0:
            return cur.work, 0.0, True
        init, init_log = cur.forward(start0 - 1)
        return init, init_log, False

    def constrained_log_probability(
        self,
        codes: np.ndarray,
        post: Posterior,
        start0: int,
        end0: int,
        cls: np.ndarray,
        allowed: np.ndarray,
    ) -> float:
        cur = self.cursor(codes, post)
        init, init_log, is_start = self._slot_before(cur, start0)
        allowedf = self.allowed_slots(allowed)
        query = (codes, start0, end0, init, is_start, cls, allowedf, True)
        lg = self.constrained_slots(*query, cur.work)
        if lg == -np.inf:
            return -np.inf
        beta, blog = cur.backward(end0 - 1)
        ld = sparse_query.log_dot(cur.work, 0, beta, 0)
        if ld == -np.inf:
            return -np.inf
        return min(0.0, ld + lg + init_log + blog - post.loglik)

    def segment_log_probability(
        self, codes: np.ndarray, post: Posterior, start0: int, end0: int, mask: np.ndarray
    ) -> float:
        cls, allowed = one_class(start0, end0, mask)
        return self.constrained_log_probability(codes, post, start0, end0, cls, allowed)

    def segment_log_odds_terms(
        self, codes: np.ndarray, post: Posterior, start0: int, end0: int, mask: np.ndarray
    ) -> list[float]:
        cur = self.cursor(codes, post)
        init, _, is_start = self._slot_before(cur, start0)
        terms = []
        for msk in (mask, ~mask):
            mf = self.mask_slots(msk)
            l1 = self.restricted_slots(codes, start0, end0, init, is_start, mf, True, cur.work)
            s1 = sparse_query.log_dot(cur.work, 0, cur.ones, 0) if l1 > -np.inf else -math.inf
            l0 = self.restricted_slots(codes, start0, end0, init, is_start, mf, False, cur.work)
            if l0 == -np.inf:
                terms.append(math.nan)
                continue
            if s1 == -math.inf:
                terms.append(-math.inf)
                continue
            terms.append(s1 + l1 - sparse_query.log_dot(cur.work, 0, cur.ones, 0) - l0)
        return terms


class _Snapshots:
    """The vectors of one direction inside one checkpoint block every ``sub`` positions,
    stepped from the block's checkpoint as far as queries have needed them.

    Forward (``step = 1``): snapshot ``j`` is the vector at ``block start + j * sub``;
    backward (``step = -1``): at ``block end - 1 - j * sub``.  Each is the vector one pass
    from the checkpoint reaches (a step and its rescaling depend only on the vector
    stepped), so a query that continues from one gets the same vector to the bit.
    """

    def __init__(self, cur: Cursor, step: int) -> None:
        post, m = cur.post, cur.sp.n_states
        self.cur, self.step = cur, step
        self.sub = max(16, math.isqrt(max(post.block, 1)) + 1)
        self.vecs = np.zeros((post.block // self.sub + 2, m + 2))
        self.exps = np.zeros(self.vecs.shape[0], dtype=np.int64)  # binary exponents taken out
        self.ck_base = 0.0  # the checkpoint's log scale
        self.bk = -1
        self.anchor = self.reach = -1  # snapshot 0's position; the furthest one's
        if step > 0:
            self.ck, self.ck_log = post.alpha_ck, post.alpha_ck_log
            self.advance, self.tables = sparse_query.forward_advance, cur.sp.fwd
        else:
            self.ck, self.ck_log = post.beta_ck, post.beta_ck_log
            self.advance, self.tables = sparse_query.backward_advance, cur.sp.bwd

    def load(self, bk: int, pos: int, rows: np.ndarray) -> tuple[int, int]:
        """Put in row 0 of ``rows`` the snapshot of block ``bk`` nearest ``pos`` on the
        checkpoint's side (stepping further snapshots first where they do not reach it);
        returns its position and the binary exponent taken out since the checkpoint."""
        cur, sub, st, vecs = self.cur, self.sub, self.step, self.vecs
        if self.bk != bk:
            block = cur.post.block
            sparse_query.to_slots(self.ck[bk], cur.sp.perm, rows, 0)
            first = bk * block
            self.anchor = first if st > 0 else min(cur.codes.shape[0], first + block) - 1
            self.reach = self.anchor
            vecs[0] = rows[0]
            self.exps[0] = 0
            self.ck_base = float(self.ck_log[bk])
            self.bk = bk
        while (pos - self.reach) * st >= sub:  # one snapshot further into the block
            j = (self.reach - self.anchor) * st // sub
            rows[0] = vecs[j]
            nxt = self.reach + st * sub
            ex = self.advance(cur.codes, self.reach, nxt, rows, *self.tables, cur.lim)
            vecs[j + 1] = rows[0]
            self.exps[j + 1] = self.exps[j] + ex
            self.reach = nxt
        j = (pos - self.anchor) * st // sub
        rows[0] = vecs[j]
        return self.anchor + st * j * sub, int(self.exps[j])


class Cursor:
    """Forward and backward vectors of one posterior in the chain-sparse slots, reused.

    Segment queries arrive mostly in position order, so the last forward vector
    (and the last backward vector) recomputed from a checkpoint is kept: a later
    query near it in the same block continues from it; any other starts from the
    nearest snapshot of the block (:class:`_Snapshots`).  The steps and the rescaling
    decisions are those of a pass from the checkpoint, so the result does not depend
    on the order of the queries.
    """

    def __init__(self, backend: SparseBackend, codes: np.ndarray, post: Posterior) -> None:
        m = backend.t.n_states
        self.backend, self.sp, self.codes, self.post = backend, backend.sp, codes, post
        self.alpha, self.beta = post.alpha_ck, post.beta_ck
        self.lim = backend.lim
        self.f = np.zeros((2, m + 2))
        self.b = np.zeros((2, m + 2))
        self.f_pos = self.b_pos = -1
        self.f_log = self.b_log = 0.0
        # log scale = the block checkpoint's + (binary exponents taken out since) * ln 2, in
        # one sum whatever the route, so it is that of one pass from the checkpoint
        self.f_exp = self.b_exp = 0
        self.work = np.zeros((2, m + 2))
        self.ones = np.ones((1, m + 2))
        # snapshots of the current block's vectors: a query steps from the nearest one
        # on the checkpoint's side instead of from the checkpoint
        self.f_snaps, self.b_snaps = _Snapshots(self, 1), _Snapshots(self, -1)

    def serves(self, backend: SparseBackend, codes: np.ndarray, post: Posterior) -> bool:
        """True while this cursor was made for these very tables, record and checkpoints."""
        return (
            self.backend is backend
            and self.codes is codes
            and self.post is post
            and self.alpha is post.alpha_ck
            and self.beta is post.beta_ck
        )

    def forward(self, pos: int) -> tuple[np.ndarray, float]:
        """Row 0 of the returned array: scaled forward vector at ``pos`` in slots; log scale."""
        post, sp = self.post, self.sp
        bk = pos // post.block
        near = 0 <= self.f_pos <= pos and pos - self.f_pos < self.f_snaps.sub
        if not (near and self.f_pos // post.block == bk):
            self.f_pos, self.f_exp = self.f_snaps.load(bk, pos, self.f)
            self.f_log = self.f_snaps.ck_base + self.f_exp * LN2
        if pos > self.f_pos:
            ex = sparse_query.forward_advance(
                self.codes, self.f_pos, pos, self.f, *sp.fwd, self.lim
            )
            self.f_pos, self.f_exp = pos, self.f_exp + ex
            self.f_log = self.f_snaps.ck_base + self.f_exp * LN2
        return self.f, self.f_log

    def backward(self, pos: int) -> tuple[np.ndarray, float]:
        """Row 0 of the returned array: scaled backward vector at ``pos`` in slots; log scale.

        Every vector is the one a single backward pass from the block's checkpoint reaches
        (a step and its rescaling depend only on the vector stepped), whether it continues
        the last query, a snapshot of the block or the checkpoint itself.
        """
        post, sp = self.post, self.sp
        bk = pos // post.block
        near = self.b_pos >= pos and self.b_pos - pos < self.b_snaps.sub
        if not (near and self.b_pos // post.block == bk):
            self.b_pos, self.b_exp = self.b_snaps.load(bk, pos, self.b)
            self.b_log = self.b_snaps.ck_base + self.b_exp * LN2
        if pos < self.b_pos:
            ex = sparse_query.backward_advance(
                self.codes, self.b_pos, pos, self.b, *sp.bwd, self.lim
            )
            self.b_pos, self.b_exp = pos, self.b_exp + ex
            self.b_log = self.b_snaps.ck_base + self.b_exp * LN2
        return self.b, self.b_log
