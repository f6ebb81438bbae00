"""The two-state kernel family: at most two emitting states per code (see engine.small)."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from seqstate.engine import passes
from seqstate.engine.generic.backend import Array, GenericBackend
from seqstate.engine.small import tables as small

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

    @classmethod
    def fitting(cls, tables: EngineTables) -> SmallBackend | None:
        """The backend of ``tables``, or None when the model does not fit these kernels."""
        sm = small.build(tables)
        return None if sm is None else cls(tables, sm)

    def loglik(self, codes: np.ndarray) -> tuple[float, int]:
        # the family's own whole-record forward (kept for speed, see engine.small)
        sm = self.sm
        return small.forward_loglik(codes, sm.start, sm.end, *self.steps, sm.lim)

    def passes_for(self, group: Array | None = None, n_groups: int = 0) -> passes._Generic:
        return passes._Small(self.t, self)
