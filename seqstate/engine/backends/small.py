"""The two-state kernel family: at most two emitting states per code (see engine.small)."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from seqstate.engine import small, small_posterior
from seqstate.engine.backends.generic import Array, Checkpoints, GenericBackend
from seqstate.engine.buffers import work_buffer

if TYPE_CHECKING:
    from seqstate.engine.tables import EngineTables


class SmallBackend(GenericBackend):
    """Whole-record passes by :mod:`seqstate.engine.small`; the checkpoints they write
    have the generic meaning, so the vector and segment queries are the generic ones."""

    name = "small"
    steps: tuple[np.ndarray, ...]

    def __init__(self, tables: EngineTables, sm: small.SmallTables) -> None:
        super().__init__(tables)
        self.sm = sm
        # the kernels' argument lists, written once: the compact steps and their logs
        self.steps = (sm.K, sm.st, sm.wide, sm.cls, sm.W, sm.T, sm.E)
        self.vit = (sm.log_start, sm.log_end, sm.K, sm.st, sm.wide, sm.cls, sm.LT, sm.LE)
        self.vit += (sm.logT, sm.logE)

    @classmethod
    def fitting(cls, tables: EngineTables) -> SmallBackend | None:
        """The backend of ``tables``, or None when the model does not fit these kernels."""
        sm = small.build(tables)
        return None if sm is None else cls(tables, sm)

    def loglik(self, codes: np.ndarray) -> tuple[float, int]:
        sm = self.sm
        return small.forward_loglik(codes, sm.start, sm.end, *self.steps, sm.lim)

    def posterior(
        self, codes: Array, group: Array, n_groups: int, block: int, out: Array, ck: Checkpoints
    ) -> tuple[float, int]:
        sm = self.sm
        gc = small.group_table(sm, group)
        full = work_buffer(self.t.n_states)
        return small_posterior.posterior_checkpointed(
            codes, sm.start, sm.end, *self.steps, block, gc, out, *ck, full, sm.lim
        )

    def viterbi(self, codes: np.ndarray, block: int, path: np.ndarray) -> tuple[float, int]:
        scratch = small.viterbi_scratch(self.sm, codes.shape[0], block)
        return small.viterbi_checkpointed(codes, *self.vit, block, path, *scratch)
