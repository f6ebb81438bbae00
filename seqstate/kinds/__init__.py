"""Model kinds: what a model's labelled states mean as features.

:func:`kind_of` gives a model's kind; each kind writes its features, its sampled
truth and its extra score columns (see :class:`~seqstate.kinds.base.Kind`).
``segments`` (labelled segments and CpG statistics) is the default; ``genes``
is the kind of models whose manifest says ``[annotate] features =
"gene_structure"``.  A new kind is a module here with a :class:`Kind` subclass,
listed in :data:`KINDS`.
"""

from seqstate.kinds.base import Group, Kind, RecordData, group_index, track_groups
from seqstate.kinds.genes import GENES
from seqstate.kinds.segments import SEGMENTS
from seqstate.model import Model

#: The kinds a model is tried against, in order; the last claims every model.
KINDS: tuple[Kind, ...] = (GENES, SEGMENTS)


def kind_of(model: Model) -> Kind:
    """The kind of ``model``: the first of :data:`KINDS` that claims it."""
    return next(kind for kind in KINDS if kind.claims(model))


__all__ = [
    "GENES",
    "KINDS",
    "SEGMENTS",
    "Group",
    "Kind",
    "RecordData",
    "group_index",
    "kind_of",
    "track_groups",
]
