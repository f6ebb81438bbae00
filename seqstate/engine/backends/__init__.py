"""The kernel families, one object each, chosen once per model by :func:`choose`.

* ``generic`` (:class:`GenericBackend`) -- any model;
* ``small`` (:class:`SmallBackend`) -- at most two emitting states per code
  (two-state models, one-state-per-symbol layouts);
* ``sparse`` (:class:`SparseBackend`) -- large models made mostly of chains.

Each serves ``loglik``, ``posterior``, ``viterbi``, the forward/backward vectors at
a position and the restricted forward and segment queries of one model's
:class:`~seqstate.engine.tables.EngineTables`, with its argument lists written once.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from seqstate.engine.generic.backend import GenericBackend
from seqstate.engine.small.backend import SmallBackend
from seqstate.engine.sparse.backend import SparseBackend

if TYPE_CHECKING:
    from seqstate.engine.tables import EngineTables

Backend = GenericBackend  # the common interface (the specialised families derive from it)

#: The specialised families in the order "auto" tries them (they never both fit: the
#: two-state family takes at most 16 states, the chain-sparse one at least 32).
SPECIALISED: tuple[type[SmallBackend] | type[SparseBackend], ...] = (SmallBackend, SparseBackend)


def choose(tables: EngineTables, choice: str, generic: GenericBackend) -> GenericBackend:
    """The backend of ``tables`` for ``choice`` ("auto", "generic", "small", "sparse").

    "auto" takes the first specialised family that fits, else ``generic``; a named
    specialised family must fit (ValueError otherwise).
    """
    if choice == "generic":
        return generic
    for family in SPECIALISED:
        if choice in ("auto", family.name):
            backend = family.fitting(tables)
            if backend is not None:
                return backend
            if choice == family.name:
                raise ValueError(f"the model does not fit the {choice} kernels")
    if choice != "auto":
        raise ValueError(f"unknown kernel family {choice!r}")
    return generic


__all__ = ["Backend", "GenericBackend", "SmallBackend", "SparseBackend", "choose"]
