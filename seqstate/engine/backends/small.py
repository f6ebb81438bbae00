"""The two-state kernel family: at most two emitting states per code (see engine.small)."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from seqstate.engine import small, small_posterior
from seqstate.engine.backends.generic import GenericBackend
from seqstate.engine.buffers import work_buffer

if TYPE_CHECKING:
    from seqstate.engine.tables import EngineTables


class SmallBackend(GenericBackend):
    """Whole-record passes by :mod:`seqstate.engine.small`; the checkpoints they write
    have the generic meaning, so the vector and segment queries are the generic ones."""

    name = "small"

    def __init__(self, tables: EngineTables, sm: small.SmallTables) -> None:
        super().__init__(tables)
        self.sm = sm

    @classmethod
    def fitting(cls, tables: EngineTables) -> SmallBackend | None:
        """The backend of ``tables``, or None when the model does not fit these kernels."""
        sm = small.build(tables)
        return None if sm is None else cls(tables, sm)

    def loglik(self, codes: np.ndarray) -> tuple[float, int]:
        sm = self.sm
        return small.forward_loglik(
            codes, sm.start, sm.end, sm.K, sm.st, sm.wide, sm.cls, sm.W, sm.T, sm.E, sm.lim
        )

    def posterior(
        self,
        codes: np.ndarray,
        group: np.ndarray,
        n_groups: int,
        block: int,
        out: np.ndarray,
        ck: tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray],
    ) -> tuple[float, int]:
        sm = self.sm
        alpha_ck, alpha_log, beta_ck, beta_log = ck
        return small_posterior.posterior_checkpointed(
            codes,
            sm.start,
            sm.end,
            sm.K,
            sm.st,
            sm.wide,
            sm.cls,
            sm.W,
            sm.T,
            sm.E,
            block,
            small.group_table(sm, group),
            out,
            alpha_ck,
            alpha_log,
            beta_ck,
            beta_log,
            work_buffer(self.t.n_states),
            sm.lim,
        )

    def viterbi(self, codes: np.ndarray, block: int, path: np.ndarray) -> tuple[float, int]:
        sm = self.sm
        return small.viterbi_checkpointed(
            codes,
            sm.log_start,
            sm.log_end,
            sm.K,
            sm.st,
            sm.wide,
            sm.cls,
            sm.LT,
            sm.LE,
            sm.logT,
            sm.logE,
            block,
            path,
            *small.viterbi_scratch(sm, codes.shape[0], block),
        )
