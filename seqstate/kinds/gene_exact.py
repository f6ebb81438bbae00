"""Exact gene-feature queries: the probability of an exon with exactly its bounds and
frame, and of an mRNA's whole structure (``exon_probability``, ``structure_probability``).

:func:`exact_allowed` gives the allowed state sets per class, :func:`exon_query` and
:func:`structure_query` the class of each position of a query (0-based half-open),
:func:`exact_scorer` the scorer run on a record's (or a window's) posterior.
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np

from seqstate.engine import api
from seqstate.kinds.gene_decoding import GeneLine, GenePrediction, cds_phases, codon_positions
from seqstate.model import Model

#: Classes of the exact-feature queries (rows of :func:`exact_allowed`): a base outside
#: the strand's CDS states; a CDS base at codon position 0, 1, 2 (in the transcript's own
#: orientation); a base outside the strand's gene states (CDS and intron); an intron base.
NOT_CDS, FRAME0, NOT_GENE, INTRON = 0, 1, 4, 5


def exact_allowed(model: Model) -> dict[str, np.ndarray]:
    """Per strand, the allowed sets (6 x states, booleans) of the exact-feature queries,
    one row per class (:data:`NOT_CDS`, :data:`FRAME0` + codon position,
    :data:`NOT_GENE`, :data:`INTRON`).  A CDS state without a codon position
    (:func:`codon_positions` -1) is in all three frame rows."""
    frame = codon_positions(model)
    out = {}
    for strand in "+-":
        allowed = np.zeros((6, model.n_states), dtype=np.bool_)
        for i, st in enumerate(model.states):
            mine = st.strand == strand
            cds = mine and st.label == "CDS"
            allowed[NOT_CDS, i] = not cds
            allowed[NOT_GENE, i] = not (mine and st.label in ("CDS", "intron"))
            allowed[INTRON, i] = mine and st.label == "intron"
            if cds:
                for f in range(3) if frame[i] < 0 else (int(frame[i]),):
                    allowed[FRAME0 + f, i] = True
        out[strand] = allowed
    return out


def _frame_classes(cls: np.ndarray, lo: int, a: int, b: int, strand: str, phase: int) -> None:
    # codon positions of the CDS piece [a, b) whose 5' base has GFF3 phase ``phase``
    first = (3 - phase) % 3
    steps = np.arange(b - a) if strand == "+" else np.arange(b - a)[::-1]
    cls[a - lo : b - lo] = FRAME0 + (first + steps) % 3


def exon_query(n: int, strand: str, a: int, b: int, phase: int) -> tuple[int, int, np.ndarray]:
    """``(lo, hi, cls)`` of the query "an exon with exactly the bounds ``[a, b)`` and this
    frame": every base a CDS state of the strand at the codon position that the GFF3
    ``phase`` of the piece's 5' base gives, and the bases just outside (``a - 1`` and
    ``b``, where inside the stretch ``[0, n)``) not CDS states of the strand.  0-based,
    half-open; ``cls`` holds one class of :func:`exact_allowed` per position of
    ``[lo, hi)``."""
    lo, hi = max(0, a - 1), min(n, b + 1)
    cls = np.full(hi - lo, NOT_CDS, dtype=np.int64)
    _frame_classes(cls, lo, a, b, strand, phase)
    return lo, hi, cls


def structure_query(n: int, gene: GenePrediction) -> tuple[int, int, np.ndarray]:
    """``(lo, hi, cls)`` of the query "a gene with exactly this structure": each CDS
    piece in its frame (:func:`exon_query`), every base between two pieces an intron
    state of the strand, and the bases just outside the gene's span not gene states of
    the strand (where inside ``[0, n)``)."""
    g0, g1 = gene.span
    lo, hi = max(0, g0 - 1), min(n, g1 + 1)
    cls = np.full(hi - lo, NOT_GENE, dtype=np.int64)
    cls[g0 - lo : g1 - lo] = INTRON
    for (a, b), phase in zip(gene.pieces, cds_phases(gene)):
        _frame_classes(cls, lo, a, b, gene.strand, phase)
    return lo, hi, cls


#: ``exact(line, gene)``: the exact probability of one line's feature (the exon or CDS
#: with its bounds and frame, the mRNA's whole structure), or None (other lines, unscored).
ExactScore = Callable[[GeneLine, GenePrediction], float | None]


def exact_scorer(
    tables: api.EngineTables,
    codes: np.ndarray,
    post: api.Posterior,
    allowed: dict[str, np.ndarray],
    n: int,
    origin0: int = 0,
) -> ExactScore:
    """The :data:`ExactScore` of genes on ``codes`` and ``post`` (a whole stretch of ``n``
    bases, or a window's view whose local 0 is stretch position ``origin0``)."""

    def exact(ln: GeneLine, gene: GenePrediction) -> float | None:
        if ln.type == "mRNA":
            lo, hi, cls = structure_query(n, gene)
        elif ln.type in ("exon", "CDS") and ln.piece is not None:
            phase = cds_phases(gene)[ln.piece]
            lo, hi, cls = exon_query(n, gene.strand, ln.start0, ln.end0, phase)
        else:
            return None
        lp = api.constrained_log_probability(
            tables, codes, post, lo - origin0, hi - origin0, cls, allowed[gene.strand]
        )
        return math.exp(lp) if lp > -math.inf else 0.0

    return exact


#: Number format of ``exon_probability`` and ``structure_probability``.
EXACT_FORMAT = ".4g"
