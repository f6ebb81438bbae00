"""The generic kernel family: any model, predecessor and successor lists, dense emissions."""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

import numpy as np

from seqstate.engine import passes
from seqstate.engine._common import rescale_limit, smallest_factor
from seqstate.engine.buffers import work_buffer
from seqstate.engine.generic import queries as kernels_query
from seqstate.engine.generic.queries import one_class

if TYPE_CHECKING:
    from seqstate.engine.api import Posterior
    from seqstate.engine.tables import EngineTables

Array = np.ndarray
#: A posterior's checkpoints: forward vectors, their log scales, backward vectors, theirs.
Checkpoints = tuple[Array, Array, Array, Array]
#: Emission factors, the states that emit each code, and the moves into (or out of) a state.
Moves = tuple[Array, Array, Array, Array, Array, Array]


class GenericBackend:
    """The generic kernels (:mod:`seqstate.engine.generic.kernels`) on one model's tables.

    Every method takes an encoded record and returns what the kernels return: a
    failing position instead of an error (the API turns it into one).  The
    specialised families derive from this class and keep what they do not replace.
    """

    name = "generic"
    #: argument groups of the kernels (see ``__init__``)
    fwd: Moves
    bwd: Moves

    def __init__(self, tables: EngineTables) -> None:
        t = self.t = tables
        #: the rescaling threshold of these tables (see :func:`_common.rescale_limit`)
        self.lim = rescale_limit(smallest_factor(t.pred_p, t.E))
        # the kernels' argument lists, written once: emissions and moves into a state
        # (forward) and out of a state (backward)
        self.fwd = (t.E, t.nz_ptr, t.nz_state, t.pred_ptr, t.pred_src, t.pred_p)
        self.bwd = (t.E, t.nz_ptr, t.nz_state, t.succ_ptr, t.succ_dst, t.succ_p)

    # ------------------------------------------------------------- whole-record passes
    def passes_for(self, group: Array | None = None, n_groups: int = 0) -> passes._Generic:
        """The posterior passes of this family (:mod:`seqstate.engine.passes`) for the
        posterior columns ``group`` (only the chain-sparse numbering depends on them)."""
        return passes._Generic(self.t, self)

    def loglik(self, codes: np.ndarray) -> tuple[float, int]:
        """(log-likelihood, fail position or -1) of one record."""
        return self.passes_for().loglik(codes)

    def posterior(
        self, codes: Array, group: Array, n_groups: int, block: int, out: Array, ck: Checkpoints
    ) -> tuple[float, int]:
        """Posteriors summed by ``group`` into ``out``; checkpoints into ``ck`` (alpha,
        alpha log, beta, beta log).  Returns (log-likelihood, fail position or -1)."""
        return self.passes_for(group, n_groups).posterior(codes, block, group, n_groups, out, ck)

    # ------------------------------------------------------------- vectors and segments
    def forward_vector(
        self, codes: np.ndarray, post: Posterior, pos: int
    ) -> tuple[np.ndarray, float]:
        """Scaled forward vector at ``pos`` and its natural-log scale."""
        out = work_buffer(self.t.n_states)
        ck = (post.block, post.alpha_ck, post.alpha_ck_log)
        lg = kernels_query.vector_at(codes, pos, self.t.start, *self.fwd, *ck, out)
        return out, lg

    def backward_vector(
        self, codes: np.ndarray, post: Posterior, pos: int
    ) -> tuple[np.ndarray, float]:
        """Scaled backward vector at ``pos`` and its natural-log scale."""
        m = self.t.n_states
        out = work_buffer(m)
        ck = (post.block, post.beta_ck, post.beta_ck_log)
        lg = kernels_query.backward_vector_at(codes, pos, *self.bwd, *ck, out, work_buffer(m))
        return out, lg

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
        """Forward pass over ``[start0, end0)``, position i through the states of
        ``allowed[cls[i - start0]]`` only, from ``init`` (the start factors when
        ``init_is_start``); (scaled vector, log scale)."""
        t = self.t
        out = work_buffer(t.n_states)
        scratch = kernels_query.constrained_scratch(
            t.n_states, t.pred_src.shape[0], allowed.shape[0]
        )
        query = (codes, start0, end0, init, init_is_start, cls, allowed, use_emissions)
        lg = kernels_query.constrained_forward(*query, *self.fwd, out, *scratch)
        return out, lg

    def restricted(
        self,
        codes: np.ndarray,
        start0: int,
        end0: int,
        init: np.ndarray,
        init_is_start: bool,
        mask: np.ndarray,
        use_emissions: bool,
    ) -> tuple[np.ndarray, float]:
        """Forward pass over ``[start0, end0)`` through the ``mask`` states only, from
        ``init`` (the start factors when ``init_is_start``); (scaled vector, log scale)."""
        cls, allowed = one_class(start0, end0, mask)
        query = (codes, start0, end0, init, init_is_start, cls, allowed, use_emissions)
        return self.constrained(*query)

    def _before(self, codes: np.ndarray, post: Posterior, start0: int) -> tuple:
        """(init, its log scale, init_is_start) of a segment starting at ``start0``."""
        if start0 == 0:
            return self.t.start, 0.0, True
        init, init_log = self.forward_vector(codes, post, start0 - 1)
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
        """log P(z_i in allowed[cls[i - start0]] for every i in [start0, end0) | x); see
        the API."""
        init, init_log, is_start = self._before(codes, post, start0)
        query = (codes, start0, end0, init, is_start, cls, allowed, True)
        vec, lg = self.constrained(*query)
        if lg == -np.inf:
            return -np.inf
        beta, blog = self.backward_vector(codes, post, end0 - 1)
        joint = float(np.dot(vec, beta))
        if joint <= 0.0:
            return -np.inf
        return min(0.0, math.log(joint) + lg + init_log + blog - post.loglik)

    def segment_log_probability(
        self, codes: np.ndarray, post: Posterior, start0: int, end0: int, mask: np.ndarray
    ) -> float:
        """log P(z_i in mask for every i in [start0, end0) | x); see the API."""
        cls, allowed = one_class(start0, end0, mask)
        return self.constrained_log_probability(codes, post, start0, end0, cls, allowed)

    def segment_log_odds_terms(
        self, codes: np.ndarray, post: Posterior, start0: int, end0: int, mask: np.ndarray
    ) -> list[float]:
        """The two terms of the segment log-odds (inside ``mask``, outside it); see the API."""
        init, _, is_start = self._before(codes, post, start0)
        terms = []
        for msk in (mask, ~mask):
            v1, l1 = self.restricted(codes, start0, end0, init, is_start, msk, True)
            v0, l0 = self.restricted(codes, start0, end0, init, is_start, msk, False)
            if l0 == -np.inf:
                terms.append(math.nan)
                continue
            s1 = float(v1.sum())
            if l1 == -np.inf or s1 <= 0:
                terms.append(-math.inf)
                continue
            terms.append(math.log(s1) + l1 - math.log(float(v0.sum())) - l0)
        return terms
