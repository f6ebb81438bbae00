"""The two-state kernel family: at most two emitting states per code (two-state models,
one-state-per-symbol layouts).

* :mod:`.tables` -- the compact tables (:func:`build`), the wide steps and the family's own
  whole-record log-likelihood (kept for speed);
* :mod:`.posterior` -- forward, backward and posterior passes over chunks of codes;
* :mod:`.viterbi` -- the Viterbi passes in compact indices;
* :mod:`.backend` -- :class:`~.backend.SmallBackend` (segment queries are the generic ones).

MEA runs on the generic family's kernels for these models.
"""

from seqstate.engine.small.tables import MAX_STATES, SmallTables, build, group_table

__all__ = ["MAX_STATES", "SmallTables", "build", "group_table"]
