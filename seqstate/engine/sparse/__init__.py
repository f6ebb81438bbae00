"""The chain-sparse kernel family: large models made mostly of chains (gene structures).

* :mod:`.tables` -- the renumbering into chains and the slot tables (:func:`build`), the
  shared steps and rescaling in powers of two;
* :mod:`.posterior` -- forward, backward and posterior passes over chunks of codes;
* :mod:`.viterbi` -- the Viterbi passes in slots;
* :mod:`.mea` -- the maximum-expected-accuracy passes in slots;
* :mod:`.queries` -- segment queries in slots (vectors at a position, constrained forward);
* :mod:`.backend` -- :class:`~.backend.SparseBackend`.
"""

from seqstate.engine.sparse.tables import (
    MAX_KEYED_GROUPS,
    MIN_CHAIN_SHARE,
    MIN_STATES,
    SparseTables,
    build,
    chain_order,
    fits,
    group_key,
    group_runs,
)

__all__ = [
    "MAX_KEYED_GROUPS",
    "MIN_CHAIN_SHARE",
    "MIN_STATES",
    "SparseTables",
    "build",
    "chain_order",
    "fits",
    "group_key",
    "group_runs",
]
