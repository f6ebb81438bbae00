"""What every model kind provides, and the track groups all kinds share.

A *kind* is what a model's labelled states mean as features: labelled segments
(:mod:`seqstate.kinds.segments`, the default) or gene structures
(:mod:`seqstate.kinds.genes`).  The commands never test a label or a manifest
key to choose what to write: they ask :func:`seqstate.kinds.kind_of` for the
model's kind and call it.

A *track group* is one (label, strand) pair of the model: its states are the
states with that label and strand, and its posterior is the sum of theirs.
Segments are 0-based half-open ``[start0, end0)`` on one record.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, TextIO

import numpy as np

from seqstate.engine import api
from seqstate.io.gff3 import GFF3Writer
from seqstate.model import Model

if TYPE_CHECKING:
    from seqstate.kinds.stream import StreamRecord, TrackSink

#: GFF3 column 2 of every feature seqstate writes.
SOURCE = "seqstate"


@dataclass(frozen=True)
class Group:
    """A (label, strand) pair, the states that report it, and its track name.

    ``strand`` is the strand features of this group are written on (``+``, ``-``
    or None).  ``track_name`` is the label, plus ``.plus``/``.minus`` when the
    label occurs on both strands.
    """

    label: str
    strand: str | None
    states: tuple[int, ...]
    track_name: str


_STRAND_WORD = {"+": "plus", "-": "minus", None: "unstranded"}


def track_groups(model: Model) -> list[Group]:
    """The model's (label, strand) groups, in order of first appearance among the states."""
    order: list[tuple[str, str | None]] = []
    members: dict[tuple[str, str | None], list[int]] = {}
    for i, s in enumerate(model.states):
        if s.label is None:
            continue
        key = (s.label, s.strand)
        if key not in members:
            members[key] = []
            order.append(key)
        members[key].append(i)
    strands_of: dict[str, set] = {}
    for label, strand in order:
        strands_of.setdefault(label, set()).add(strand)
    groups = []
    for label, strand in order:
        name = label if len(strands_of[label]) == 1 else f"{label}.{_STRAND_WORD[strand]}"
        groups.append(Group(label, strand, tuple(members[(label, strand)]), name))
    return groups


def group_index(model: Model, groups: list[Group]) -> np.ndarray:
    """Per state, the index of its group (or -1)."""
    out = np.full(model.n_states, -1, dtype=np.int64)
    for g, grp in enumerate(groups):
        for s in grp.states:
            out[s] = g
    return out


@dataclass
class RecordData:
    """One record (or region of it) after the posterior pass, as a kind decodes it.

    ``seq`` is the annotated stretch (``offset0`` bases into record ``seqid``),
    ``codes`` its emission codes, ``symbols`` its symbol indices (negative for an
    unknown base; :attr:`unknown` is made from them when asked for), ``post`` the
    per-group posterior of ``groups`` (``state_group`` per state).  ``decode``,
    ``min_posterior``, ``min_length`` and ``split_unknown`` are annotate's options.
    """

    model: Model
    tables: api.EngineTables
    groups: list[Group]
    state_group: np.ndarray
    seqid: str
    offset0: int
    seq: bytes
    codes: np.ndarray
    symbols: np.ndarray
    post: api.Posterior
    decode: str
    min_posterior: float
    min_length: int
    split_unknown: int
    #: called with the record's written genes (gene kinds; for CDS and protein files)
    on_genes: Callable[[list[Any]], None] | None = None
    #: feature IDs start with this (None: ``seqid``); ``ID:START-END`` for a region run
    id_stem: str | None = None
    #: the gene kind's filters (:class:`seqstate.kinds.genes.GeneFilter`; None: none)
    gene_filter: Any = None
    #: counts the kind reports for the stretch (gene kinds: genes, mrnas, filtered_*)
    counts: dict[str, int] = field(default_factory=dict)

    @property
    def unknown(self) -> np.ndarray:
        """A boolean per base: unknown (N, ambiguity codes, masked with ``--masked unknown``)."""
        return self.symbols < 0


class Kind(ABC):
    """A model kind: its feature table columns, feature writer, truth writer and fit rule."""

    #: Short name (``segments``, ``genes``), for messages and the module map.
    name: str = ""
    #: The ``[fit] state_rule`` of this kind when a manifest declares none; None:
    #: fit infers one from the label groups.
    state_rule: str | None = None

    @abstractmethod
    def claims(self, model: Model) -> bool:
        """Whether ``model`` is of this kind."""

    @abstractmethod
    def feature_columns(self, groups: list[Group], calibrated: bool = False) -> list[str]:
        """The header of annotate's feature table (TSV) for a model with these groups;
        ``calibrated``: a recalibrated model, a ``calibrated_`` column after each score."""

    @abstractmethod
    def write_record(self, rec: RecordData, gff: GFF3Writer, tsv: TextIO) -> int:
        """Decode, score and write one record's features (GFF3 and TSV); the count written."""

    def write_stream(
        self, rec: StreamRecord, gff: GFF3Writer, tsv: TextIO, track_sink: TrackSink
    ) -> tuple[int, float, int]:
        """Decode, score and write one long record window by window (bounded memory).

        The lines written and the values given to ``track_sink`` are byte-identical to
        :meth:`write_record` on the whole record; returns ``(features written,
        log-likelihood (natural log), unknown bases)``.  See :mod:`seqstate.kinds.stream`.
        This default reads the whole record and calls :meth:`write_record` (not bounded
        in memory); kinds override it.
        """
        from seqstate.kinds.stream import write_whole

        return write_whole(self, rec, gff, tsv, track_sink)

    @abstractmethod
    def truth_of(self, path: np.ndarray, model: Model, state_group: np.ndarray) -> list[Any]:
        """The true features of a sampled state path (kept until the truth is written)."""

    @abstractmethod
    def write_truth(
        self,
        gff: GFF3Writer,
        model: Model,
        groups: list[Group],
        truth: list[Any],
        seqid: str,
        offset0: int = 0,
        numbers: list[int] | None = None,
    ) -> int:
        """Write the true features of one sampled record, unscored; the count written.

        ``truth`` may be that of one piece of the record's path (:meth:`truth_cuts`) that
        starts ``offset0`` bases into the record; ``numbers`` (empty at the record's first
        piece) carries the feature numbering from one piece to the next.
        """

    def truth_cuts(self, model: Model) -> np.ndarray:
        """Per state, whether a sampled path may be cut between two positions in such
        states, the truth of each piece written in turn (:meth:`write_truth` with its
        offset and the carried numbers) giving the lines of the whole path: the states
        without a label, which are in no feature of any kind."""
        return np.array([s.label is None for s in model.states], dtype=bool)

    @abstractmethod
    def extra_columns(self, label: str) -> list[str]:
        """Score columns beyond the posterior ones for features or regions of ``label``."""

    @abstractmethod
    def extra_scores(self, label: str, seq: bytes) -> dict[str, Any]:
        """The values of :meth:`extra_columns` for one stretch of sequence."""
