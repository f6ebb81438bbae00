"""The gene kind: decoded paths -> gene -> mRNA -> exon + CDS features, and their writer.

A model is of this kind when its manifest says ``[annotate] features =
"gene_structure"`` (the built-in ``gene-segment`` model).  Its layout is in
:mod:`seqstate.kinds.gene_layout`, its fit labelling rule in
:mod:`seqstate.kinds.gene_labels`.  GFF3 coordinates are 1-based closed in
files, 0-based half-open inside.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, TextIO

import numpy as np

from seqstate.engine import api, mea
from seqstate.io.gff3 import Feature, GFF3Writer
from seqstate.io.tsvtext import tsv_row
from seqstate.kinds.base import SOURCE, Group, Kind, RecordData
from seqstate.kinds.segments import (
    SCORE_FORMATS,
    add_calibrated,
    format_value,
    label_columns,
    label_scores,
    score_segment,
    with_calibrated,
)
from seqstate.kinds.stream import StreamRecord, TrackSink
from seqstate.model import Model
from seqstate.model.recalibration import Recalibration

#: ``[annotate] features`` value of a manifest whose model is of this kind.
FEATURES = "gene_structure"

#: ``partial_reason`` values: the gene reaches the end of the annotated stretch, or it
#: was cut at a run of unknown bases (``annotate --split-unknown``).
PARTIAL_RECORD_END = "record_end"
PARTIAL_UNKNOWN_RUN = "unknown_run"


@dataclass
class GenePrediction:
    """One decoded gene: strand and CDS pieces (plus-strand coordinates, 0-based).

    ``phases`` (genomic order) come from the codon position of each piece's 5'-most
    base on the path, so they are right even for a gene that lacks its start or
    stop codon.  ``partial_reasons`` says why a gene is incomplete (empty for a
    complete one): :data:`PARTIAL_RECORD_END` (it runs into an end of the annotated
    stretch) and/or :data:`PARTIAL_UNKNOWN_RUN` (cut at a long run of unknown bases).
    """

    strand: str
    pieces: list[tuple[int, int]]  # in genomic order
    phases: list[int] | None = None
    partial_reasons: tuple[str, ...] = ()

    @property
    def partial(self) -> bool:
        return bool(self.partial_reasons)

    @property
    def span(self) -> tuple[int, int]:
        return self.pieces[0][0], self.pieces[-1][1]


def cds_length(gene: GenePrediction) -> int:
    """Coding bases of the gene's mRNA (the sum of its CDS pieces)."""
    return sum(b - a for a, b in gene.pieces)


#: Keys of the per-stretch counts the gene kind fills (``RecordData.counts``).
COUNT_GENES = "genes"
COUNT_MRNAS = "mrnas"
FILTERED_CDS_LENGTH = "filtered_cds_length"
FILTERED_GENE_POSTERIOR = "filtered_gene_posterior"


@dataclass(frozen=True)
class GeneFilter:
    """Which decoded genes are written (annotate ``--min-cds-length``,
    ``--min-gene-posterior``).

    A gene is dropped when its mRNA has fewer than ``min_cds_length`` coding bases
    (:func:`cds_length`), else when its score -- the mean posterior, over the gene's
    span, of its strand's gene states (coding and intron), column 6 of its GFF3 gene
    line -- is below ``min_gene_posterior``.  Each dropped gene is counted once, under
    the first rule it fails (:data:`FILTERED_CDS_LENGTH`, then
    :data:`FILTERED_GENE_POSTERIOR`).  Genes that are written are numbered 1, 2, ...
    in genomic order, so numbers stay consecutive.
    """

    min_cds_length: int = 0
    min_gene_posterior: float = 0.0

    def reason(self, gene: GenePrediction, gene_score: Callable[[], float | None]) -> str | None:
        """Why ``gene`` is dropped (a count key), or None when it is written.
        ``gene_score()`` gives its score (None when unscored); it is asked for only when
        the posterior rule applies."""
        if cds_length(gene) < self.min_cds_length:
            return FILTERED_CDS_LENGTH
        if self.min_gene_posterior > 0.0:
            score = gene_score()
            if score is not None and score < self.min_gene_posterior:
                return FILTERED_GENE_POSTERIOR
        return None


def unknown_runs(unknown: np.ndarray, threshold: int) -> list[tuple[int, int]]:
    """Maximal runs (0-based half-open) of at least ``threshold`` unknown bases."""
    u = np.asarray(unknown, dtype=bool)
    if not u.any():
        return []
    padded = np.concatenate([[False], u, [False]])
    edges = np.flatnonzero(padded[1:] != padded[:-1])
    return [
        (int(a), int(b)) for a, b in zip(edges[0::2], edges[1::2]) if int(b) - int(a) >= threshold
    ]


def genes_from_path(
    path: np.ndarray,
    model: Model,
    unknown: np.ndarray | None = None,
    split_unknown: int | None = None,
) -> list[GenePrediction]:
    """Runs of one strand's gene states (CDS and intron) along a path -> genes.

    A gene is a maximal run of CDS and intron states of one strand; its CDS pieces
    are the maximal runs of CDS states inside it.  With ``unknown`` (a boolean per
    base) and ``split_unknown`` (a length), every run of at least ``split_unknown``
    unknown bases inside a gene cuts it: the parts on either side become genes of
    their own, marked partial (:data:`PARTIAL_UNKNOWN_RUN`), and unknown bases are
    trimmed from the outer ends of every part.  A gene touching the first or last
    base of the path is partial (:data:`PARTIAL_RECORD_END`).  Parts without a
    coding base are dropped.  Genes come in genomic order.
    """
    m = model.n_states
    strand_of = np.zeros(m, dtype=np.int8)  # 1 plus gene state, 2 minus, 0 other
    is_cds = np.zeros(m, dtype=bool)
    for i, s in enumerate(model.states):
        if s.label in ("CDS", "intron"):
            strand_of[i] = 1 if s.strand == "+" else 2
        is_cds[i] = s.label == "CDS"
    p = np.asarray(path, dtype=np.int64)
    frame = codon_positions(model)
    g = strand_of[p]
    c = is_cds[p]
    n = p.shape[0]
    if unknown is None:
        unknown = np.zeros(n, dtype=bool)
    unknown = np.asarray(unknown, dtype=bool)
    gaps = unknown_runs(unknown, split_unknown) if split_unknown else []
    change = np.flatnonzero(g[1:] != g[:-1]) + 1
    starts = np.concatenate([[0], change])
    ends = np.concatenate([change, [n]])
    genes = []
    for s0, e0 in zip(starts.tolist(), ends.tolist()):
        if g[s0] == 0:
            continue
        strand = "+" if g[s0] == 1 else "-"
        # the run minus the long unknown runs inside it: (lo, hi, cut_left, cut_right)
        parts = []
        lo, cut_left = s0, False
        for a, b in gaps:
            if b <= s0 or a >= e0:
                continue
            if a > lo:
                parts.append((lo, a, cut_left, True))
            lo, cut_left = max(b, lo), True
        if lo < e0:
            parts.append((lo, e0, cut_left, False))
        for lo, hi, cut_l, cut_r in parts:
            while lo < hi and unknown[lo]:
                lo += 1
            while hi > lo and unknown[hi - 1]:
                hi -= 1
            cc = c[lo:hi]
            padded = np.concatenate([[False], cc, [False]])
            edges = np.flatnonzero(padded[1:] != padded[:-1])
            pieces = [(lo + int(a), lo + int(b)) for a, b in zip(edges[0::2], edges[1::2])]
            if not pieces:
                continue
            # outer ends of the part are trimmed of unknown bases (inner ones stay)
            a0, b0 = pieces[0]
            while a0 < b0 and unknown[a0]:
                a0 += 1
            pieces[0] = (a0, b0)
            a1, b1 = pieces[-1]
            while b1 > a1 and unknown[b1 - 1]:
                b1 -= 1
            pieces[-1] = (a1, b1)
            pieces = [(a, b) for a, b in pieces if b > a]
            if not pieces:
                continue
            five = [a if strand == "+" else b - 1 for a, b in pieces]
            phases = [(3 - int(frame[p[q]])) % 3 for q in five]
            reasons = []
            if s0 == 0 or e0 == n:
                reasons.append(PARTIAL_RECORD_END)
            if cut_l or cut_r:
                reasons.append(PARTIAL_UNKNOWN_RUN)
            genes.append(GenePrediction(strand, pieces, phases, tuple(reasons)))
    return genes


#: A path run as :func:`seqstate.engine.stream_paths.runs_of` gives it:
#: ``(start0, end0, key, first_state, last_state)``.
Run = tuple[int, int, int, int, int]


def run_key(model: Model) -> np.ndarray:
    """Per state, the key whose runs along a path carry the gene structure.

    0: not a gene state; 1: plus-strand intron, 2: plus-strand CDS, 3: minus-strand
    intron, 4: minus-strand CDS.  A gene of :func:`genes_from_path` is a maximal run
    of keys of one strand (1-2 or 3-4), its CDS pieces the runs of key 2 or 4.
    """
    out = np.zeros(model.n_states, dtype=np.int64)
    for i, s in enumerate(model.states):
        if s.label in ("CDS", "intron"):
            out[i] = (1 if s.strand == "+" else 3) + (s.label == "CDS")
    return out


def genes_from_runs(
    runs: list[Run],
    model: Model,
    n: int,
    read_unknown: Callable[[int, int], np.ndarray],
    split_unknown: int | None,
    state_at: Callable[[int], int],
) -> list[GenePrediction]:
    """:func:`genes_from_path` from the runs of :func:`run_key` along the path.

    ``runs`` cover ``[0, n)`` in order; ``read_unknown(a, b)`` gives the unknown
    flags (booleans) of positions ``[a, b)``; ``state_at(q)`` the path's state at a
    position ``q`` that is neither the first nor the last of its run -- it is only
    asked for the 5' base of a CDS piece cut or trimmed at unknown bases: a known
    plus-strand CDS base after an unknown one, or a known minus-strand CDS base
    before an unknown one.  Memory: per gene, O(gene length).  Equal to
    ``genes_from_path(path, model, unknown, split_unknown)``.
    """
    frame = codon_positions(model)
    genes: list[GenePrediction] = []
    i = 0
    while i < len(runs):
        if runs[i][2] == 0:
            i += 1
            continue
        side = (runs[i][2] + 1) // 2
        j = i
        while j + 1 < len(runs) and runs[j + 1][2] != 0 and (runs[j + 1][2] + 1) // 2 == side:
            j += 1
        genes += _gene_of_runs(
            runs[i : j + 1], side, n, read_unknown, split_unknown, state_at, frame
        )
        i = j + 1
    return genes


def _gene_of_runs(
    runs: list[Run],
    side: int,
    n: int,
    read_unknown: Callable[[int, int], np.ndarray],
    split_unknown: int | None,
    state_at: Callable[[int], int],
    frame: np.ndarray,
) -> list[GenePrediction]:
    # one maximal run of one strand's gene states: the parts genes_from_path makes of it
    s0, e0 = runs[0][0], runs[-1][1]
    strand = "+" if side == 1 else "-"
    thr = split_unknown or 0
    # unknown flags of the run and up to ``thr`` bases on each side: enough to tell
    # whether an unknown run reaching into the gene is at least ``thr`` long
    u0, u1 = max(0, s0 - thr), min(n, e0 + thr)
    unk = np.asarray(read_unknown(u0, u1), dtype=bool)
    gaps = [(a + u0, b + u0) for a, b in unknown_runs(unk, thr)] if thr else []
    c = np.zeros(e0 - s0, dtype=bool)
    for a, b, key, _, _ in runs:
        if key % 2 == 0:
            c[a - s0 : b - s0] = True
    ends = {}
    for a, b, _, first, last in runs:
        ends[a] = first
        ends[b - 1] = last

    def unknown(q: int) -> bool:
        return bool(unk[q - u0])

    def state(q: int) -> int:
        return ends[q] if q in ends else int(state_at(q))

    parts = []
    lo, cut_left = s0, False
    for a, b in gaps:
        if b <= s0 or a >= e0:
            continue
        if a > lo:
            parts.append((lo, a, cut_left, True))
        lo, cut_left = max(b, lo), True
    if lo < e0:
        parts.append((lo, e0, cut_left, False))
    out = []
    for lo, hi, cut_l, cut_r in parts:
        while lo < hi and unknown(lo):
            lo += 1
        while hi > lo and unknown(hi - 1):
            hi -= 1
        cc = c[lo - s0 : hi - s0]
        padded = np.concatenate([[False], cc, [False]])
        edges = np.flatnonzero(padded[1:] != padded[:-1])
        pieces = [(lo + int(a), lo + int(b)) for a, b in zip(edges[0::2], edges[1::2])]
        if not pieces:
            continue
        a0, b0 = pieces[0]
        while a0 < b0 and unknown(a0):
            a0 += 1
        pieces[0] = (a0, b0)
        a1, b1 = pieces[-1]
        while b1 > a1 and unknown(b1 - 1):
            b1 -= 1
        pieces[-1] = (a1, b1)
        pieces = [(a, b) for a, b in pieces if b > a]
        if not pieces:
            continue
        five = [a if strand == "+" else b - 1 for a, b in pieces]
        phases = [(3 - int(frame[state(q)])) % 3 for q in five]
        reasons = []
        if s0 == 0 or e0 == n:
            reasons.append(PARTIAL_RECORD_END)
        if cut_l or cut_r:
            reasons.append(PARTIAL_UNKNOWN_RUN)
        out.append(GenePrediction(strand, pieces, phases, tuple(reasons)))
    return out


def codon_positions(model: Model) -> np.ndarray:
    """Per state, the codon position (0, 1, 2) of the base it emits, in the transcript's
    own orientation; -1 for non-coding states."""
    out = np.full(model.n_states, -1, dtype=np.int64)
    for i, s in enumerate(model.states):
        base = s.name[:-1] if s.name[-1:] in "+-" else s.name
        if base in ("start_A", "stop_T") or base.startswith("cds1"):
            out[i] = 0
        elif base in ("start_T", "stop_A", "stop_G") or base.startswith("cds2"):
            out[i] = 1
        elif base in ("start_G", "stop_AR", "stop_GA") or base.startswith("cds3"):
            out[i] = 2
    return out


def decoding_classes(model: Model) -> tuple[np.ndarray, int]:
    """Per state, its class for posterior decoding of gene structures; and the count.

    Class 0 is every non-gene state (intergenic and start flanks).  Per strand
    (plus first): three CDS classes, one per codon position, then three intron
    classes, one per intron phase (``i0``, ``i1*``, ``i2*`` copies).  The classes
    carry the reading frame, so a path that maximises the expected number of bases
    in their right class keeps the frame the posterior supports.
    """
    frame = codon_positions(model)
    out = np.zeros(model.n_states, dtype=np.int64)
    for i, s in enumerate(model.states):
        if s.label not in ("CDS", "intron"):
            continue
        base = 1 if s.strand == "+" else 7
        if s.label == "CDS":
            out[i] = base + int(frame[i])
        else:
            phase = int(s.name[1]) if s.name[:1] == "i" and s.name[1:2].isdigit() else 0
            out[i] = base + 3 + phase
    return out, 13


def cds_phases(gene: GenePrediction) -> list[int]:
    """GFF3 phase of each CDS piece, in genomic order.

    GFF3 1.26: the phase is the number of bases to remove from the 5' end of the
    piece (on its strand) to reach the first base of the next codon.  Taken from
    the path when the gene has them, else from the lengths (a complete gene).
    """
    if gene.phases is not None:
        return list(gene.phases)
    order = gene.pieces if gene.strand == "+" else gene.pieces[::-1]
    phases = []
    done = 0
    for a, b in order:
        phases.append((3 - done % 3) % 3)
        done += b - a
    return phases if gene.strand == "+" else phases[::-1]


@dataclass(frozen=True)
class GeneLine:
    """One GFF3 line of a gene hierarchy (0-based half-open, plus-strand coordinates).

    ``piece`` is the index of the CDS piece in genomic order (None for gene and mRNA).
    """

    type: str
    start0: int
    end0: int
    id: str
    parent: str | None
    phase: int | None
    piece: int | None


_TYPE_RANK = {"gene": 0, "mRNA": 1, "exon": 2, "CDS": 3}


def gene_lines(gene: GenePrediction, id_stem: str, number: int) -> list[GeneLine]:
    """The gene -> mRNA -> exon + CDS lines of one gene, in file order.

    IDs: ``IDSTEM.gene.N``, ``IDSTEM.mRNA.N``, ``IDSTEM.mRNA.N.exon.K`` and
    ``IDSTEM.mRNA.N.CDS.K`` with K counted from the 5' end on the gene's strand;
    ``id_stem`` is the record ID, or ``ID:START-END`` (1-based closed) for a region
    run, so runs on different stretches never share an ID.
    File order is by start (then parent before child: gene, mRNA, exon, CDS), the
    order index tools need (common practice), whatever the strand.
    """
    g0, g1 = gene.span
    gid = f"{id_stem}.gene.{number}"
    mid = f"{id_stem}.mRNA.{number}"
    lines = [GeneLine("gene", g0, g1, gid, None, None, None)]
    lines.append(GeneLine("mRNA", g0, g1, mid, gid, None, None))
    phases = cds_phases(gene)
    k_of = range(len(gene.pieces)) if gene.strand == "+" else range(len(gene.pieces) - 1, -1, -1)
    for k, i in enumerate(k_of, start=1):
        a, b = gene.pieces[i]
        lines.append(GeneLine("exon", a, b, f"{mid}.exon.{k}", mid, None, i))
        lines.append(GeneLine("CDS", a, b, f"{mid}.CDS.{k}", mid, phases[i], i))
    lines.sort(key=lambda ln: (ln.start0, _TYPE_RANK[ln.type]))
    return lines


# ---------------------------------------------------------------- writing
GENE_COLUMNS = [
    "seqid",
    "start_1based",
    "end_1based",
    "strand",
    "type",
    "id",
    "parent",
    "phase",
    "mean_posterior",
    "min_posterior",
    "segment_probability",
    "exon_probability",
    "structure_probability",
    "length",
]


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


def write_genes(
    gff: GFF3Writer,
    tsv: TextIO | None,
    model: Model,
    tables: api.EngineTables | None,
    codes: np.ndarray | None,
    post: api.Posterior | None,
    groups: list[Group],
    predictions: list[GenePrediction],
    seqid: str,
    offset0: int,
    *,
    id_stem: str | None = None,
    gene_filter: GeneFilter | None = None,
    counts: dict[str, int] | None = None,
    written: list[GenePrediction] | None = None,
) -> int:
    """Write decoded genes as GFF3 gene -> mRNA -> exon + CDS lines; returns the line count.

    ``gene_filter`` drops genes (:class:`GeneFilter`); the genes written are numbered
    from 1 and appended to ``written``; ``counts`` gets :data:`COUNT_GENES`,
    :data:`COUNT_MRNAS` and the filtered counts.  IDs start with ``id_stem`` (default
    ``seqid``; :func:`gene_lines`).

    ``predictions`` are :class:`GenePrediction` in genomic order
    (0-based, relative to ``offset0``).  gene and mRNA span the coding part (start
    codon to stop codon; the model has no untranslated regions), exon and CDS lines
    share coordinates, CDS phase as GFF3 1.26 defines it; lines in start order,
    parents first (:func:`gene_lines`).  A partial gene has
    ``partial=true`` and ``partial_reason`` (``record_end``, ``unknown_run``) on its
    gene and mRNA lines.  Scores (when ``post`` is given): the posterior of the
    strand's gene states (CDS and intron) on gene and mRNA, of the strand's CDS
    states on exon and CDS, and the exact probability that every base of the
    feature is in those states (``segment_probability``); on exon and CDS the exact
    probability of an exon with exactly these bounds and this frame
    (``exon_probability``, :func:`exon_query`), on mRNA that of the whole structure
    (``structure_probability``, :func:`structure_query`).  Without ``post`` (a
    sampled truth) the score column is ``.`` and only ``length`` is written.  ``tsv``
    may be None.
    """
    masks = gene_masks(model)
    values = {}
    if post is not None:
        for strand in "+-":
            gene_cols, cds_col = strand_columns(groups, strand)
            values[strand] = (
                post.values[:, gene_cols].sum(axis=1, dtype=np.float64),
                post.values[:, cds_col],
            )

    recal = model.recalibration
    cds_track = (
        {}
        if recal is None
        else {strand: groups[strand_columns(groups, strand)[1]].track_name for strand in "+-"}
    )

    def score_line(ln: GeneLine, strand: str, k: int) -> dict | None:
        if post is None or tables is None or codes is None:
            return None
        sc = score_segment(
            tables,
            codes,
            post,
            values[strand][k],
            masks[strand][k],
            ln.start0,
            ln.end0,
            log_odds=False,
        )
        if recal is not None and k == 1:  # CDS lines: the strand's CDS track
            vals = values[strand][k][ln.start0 : ln.end0]
            sc = add_calibrated(sc, vals, recal, cds_track[strand])
        return sc

    exact = None
    if post is not None and tables is not None and codes is not None:
        exact = exact_scorer(tables, codes, post, exact_allowed(model), codes.shape[0])
    count = 0
    tally = _Tally(gene_filter, counts, written)
    for gp in predictions:
        scored = _memo(score_line)
        number = tally.keep(gp, scored)
        if number:
            count += write_gene(
                gff,
                tsv,
                gp,
                number,
                seqid,
                offset0,
                scored,
                id_stem=id_stem,
                exact=exact,
                recal=recal,
                cds_track=cds_track.get(gp.strand),
            )
    return count


def _memo(
    score_line: Callable[[GeneLine, str, int], dict | None],
) -> Callable[[GeneLine, str, int], dict | None]:
    """``score_line`` remembering its answers for one gene (gene and mRNA lines share
    their span, and the filter asks for the gene line's score first)."""
    seen: dict[tuple[int, int, int], dict | None] = {}

    def scored(ln: GeneLine, strand: str, k: int) -> dict | None:
        key = (ln.start0, ln.end0, k)
        if key not in seen:
            seen[key] = score_line(ln, strand, k)
        return seen[key]

    return scored


class _Tally:
    """The filter of one stretch's genes, its counts, and the numbers of kept genes."""

    def __init__(
        self,
        gene_filter: GeneFilter | None,
        counts: dict[str, int] | None,
        written: list[GenePrediction] | None,
    ) -> None:
        self.filter = gene_filter or GeneFilter()
        self.counts = counts if counts is not None else {}
        for key in (COUNT_GENES, COUNT_MRNAS, FILTERED_CDS_LENGTH, FILTERED_GENE_POSTERIOR):
            self.counts.setdefault(key, 0)
        self.written = written
        self.kept = 0

    def keep(
        self, gene: GenePrediction, score_line: Callable[[GeneLine, str, int], dict | None]
    ) -> int:
        """The number of ``gene`` when it is written (1, 2, ...), else 0 (counted)."""

        def gene_score() -> float | None:
            g0, g1 = gene.span
            sc = score_line(GeneLine("gene", g0, g1, "", None, None, None), gene.strand, 0)
            return None if sc is None else float(sc["mean_posterior"])

        why = self.filter.reason(gene, gene_score)
        if why is not None:
            self.counts[why] += 1
            return 0
        self.kept += 1
        self.counts[COUNT_GENES] += 1
        self.counts[COUNT_MRNAS] += 1  # one mRNA per gene: the model has no isoforms
        if self.written is not None:
            self.written.append(gene)
        return self.kept


def gene_masks(model: Model) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Per strand, (the strand's gene states (CDS and intron), its CDS states) as
    booleans per state: the states gene/mRNA and exon/CDS lines are scored on."""
    masks = {}
    for strand in "+-":
        cds = np.zeros(model.n_states, dtype=np.bool_)
        gene = np.zeros(model.n_states, dtype=np.bool_)
        for i, st in enumerate(model.states):
            if st.strand == strand and st.label in ("CDS", "intron"):
                gene[i] = True
                cds[i] = st.label == "CDS"
        masks[strand] = (gene, cds)
    return masks


def strand_columns(groups: list[Group], strand: str) -> tuple[list[int], int]:
    """The track-group columns of one strand: (CDS and intron columns, the CDS column)."""
    col = {(g.label, g.strand): i for i, g in enumerate(groups)}
    gene_cols = [col[k] for k in (("CDS", strand), ("intron", strand)) if k in col]
    return gene_cols, col[("CDS", strand)]


def write_gene(
    gff: GFF3Writer,
    tsv: TextIO | None,
    gp: GenePrediction,
    number: int,
    seqid: str,
    offset0: int,
    score_line: Callable[[GeneLine, str, int], dict | None],
    *,
    id_stem: str | None = None,
    exact: ExactScore | None = None,
    recal: Recalibration | None = None,
    cds_track: str | None = None,
) -> int:
    """Write one gene's lines (see :func:`write_genes`); the count written.

    With a recalibration table ``recal`` (``cds_track``: the gene strand's CDS track
    name) each score gets a ``calibrated_`` counterpart after it where the table has a
    map (:func:`~seqstate.kinds.segments.add_calibrated`; ``score_line`` adds those of
    the posterior scores): ``exon_probability`` by the CDS track's map,
    ``structure_probability`` by ``mRNA.plus``/``mRNA.minus``'s.

    ``score_line(line, strand, k)`` gives the scores of one line (``k`` 0: scored on
    the strand's gene states, 1: on its CDS states), or None for an unscored line;
    ``exact`` the exon and structure probabilities of scored lines (None: none).
    IDs start with ``id_stem`` (default ``seqid``).
    """
    strand = gp.strand
    count = 0
    seen: dict[tuple[bool, int, int], float | None] = {}
    for ln in gene_lines(gp, seqid if id_stem is None else id_stem, number):
        a, b = ln.start0, ln.end0
        # the exact query first: it reads the forward vector one base before the line's
        # own segment query, so the queries' vector positions keep increasing
        px = None
        if exact is not None and ln.type != "gene":
            which = (ln.type == "mRNA", a, b)  # exon and CDS lines share one query
            if which not in seen:
                seen[which] = exact(ln, gp)
            px = seen[which]
        sc = score_line(ln, strand, 0 if ln.type in ("gene", "mRNA") else 1)
        attrs: list[tuple[str, str | list[str]]] = [("ID", ln.id)]
        if ln.parent:
            attrs.append(("Parent", ln.parent))
        if sc is None:
            px = None
        key_x = "structure_probability" if ln.type == "mRNA" else "exon_probability"
        cal_x = None
        if recal is not None and px is not None:
            word = "plus" if strand == "+" else "minus"
            m = recal.get(f"mRNA.{word}" if ln.type == "mRNA" else str(cds_track), key_x)
            cal_x = None if m is None else m.value(px)
        if sc is not None:
            for key in ("mean_posterior", "min_posterior", "segment_probability"):
                attrs.append((key, format_value(sc[key], SCORE_FORMATS[key])))
                if "calibrated_" + key in sc:
                    c_key = "calibrated_" + key
                    attrs.append((c_key, format_value(sc[c_key], SCORE_FORMATS[c_key])))
            if px is not None:
                attrs.append((key_x, format_value(px, EXACT_FORMAT)))
                if cal_x is not None:
                    attrs.append(("calibrated_" + key_x, format_value(cal_x, EXACT_FORMAT)))
        attrs.append(("length", str(b - a)))
        if gp.partial and ln.type in ("gene", "mRNA"):
            attrs.append(("partial", "true"))
            attrs.append(("partial_reason", list(gp.partial_reasons)))
        gff.write(
            Feature(
                seqid=seqid,
                source=SOURCE,
                type=ln.type,
                start0=a + offset0,
                end0=b + offset0,
                score=None if sc is None else sc["mean_posterior"],
                strand=strand,
                phase=ln.phase,
                attributes=attrs,
            )
        )
        if tsv is not None and recal is not None:
            cells = {
                **({} if sc is None else sc),
                **({key_x: px} if px is not None else {}),
                **({"calibrated_" + key_x: cal_x} if cal_x is not None else {}),
            }
            row = [
                seqid,
                str(a + offset0 + 1),
                str(b + offset0),
                strand,
                ln.type,
                ln.id,
                ln.parent or "",
                "." if ln.phase is None else str(ln.phase),
            ]
            for col in with_calibrated(GENE_COLUMNS[8:-1]):
                v = cells.get(col)
                fmt = EXACT_FORMAT if "exon_" in col or "structure_" in col else SCORE_FORMATS[col]
                row.append("" if v is None else format_value(v, fmt))
            tsv.write(tsv_row([*row, str(b - a)]))
        elif tsv is not None:
            tsv.write(
                tsv_row(
                    [
                        seqid,
                        str(a + offset0 + 1),
                        str(b + offset0),
                        strand,
                        ln.type,
                        ln.id,
                        ln.parent or "",
                        "." if ln.phase is None else str(ln.phase),
                        format_value(sc["mean_posterior"], ".4f") if sc else "",
                        format_value(sc["min_posterior"], ".4f") if sc else "",
                        format_value(sc["segment_probability"], ".4g") if sc else "",
                        format_value(px, EXACT_FORMAT)
                        if px is not None and ln.type != "mRNA"
                        else "",
                        format_value(px, EXACT_FORMAT)
                        if px is not None and ln.type == "mRNA"
                        else "",
                        str(b - a),
                    ]
                )
            )
        count += 1
    return count


def decode_genes(
    model: Model,
    tables: api.EngineTables,
    codes: np.ndarray,
    unknown: np.ndarray,
    decode: str,
    split_unknown: int,
    record: str,
) -> list[GenePrediction]:
    """Gene structures of one encoded record, by Viterbi or by posterior decoding.

    Viterbi: the most probable path.  Posterior: the maximum expected accuracy
    path over the model's allowed moves (:func:`seqstate.engine.mea.mea`), whose
    gain at each base is the posterior of the state's class (non-gene; per strand,
    CDS by codon position and intron by phase: :func:`decoding_classes`).
    Genes are then cut at runs of at least ``split_unknown`` unknown bases.
    """
    if decode == "viterbi":
        path, _ = api.viterbi(tables, codes, record=record)
    else:
        cls, n_cls = decoding_classes(model)
        fine = api.posterior(tables, codes, group=cls, n_groups=n_cls, record=record)
        path = mea.mea(tables, codes, fine.values, cls)
        del fine
    return genes_from_path(path, model, unknown, split_unknown)


class GeneKind(Kind):
    """Gene structures: decoded paths written as gene -> mRNA -> exon + CDS hierarchies."""

    name = "genes"
    state_rule = "gene_structure"

    def claims(self, model: Model) -> bool:
        table = model.extra.get("annotate", {})
        return isinstance(table, dict) and table.get("features") == FEATURES

    def feature_columns(self, groups: list[Group], calibrated: bool = False) -> list[str]:
        if calibrated:
            return GENE_COLUMNS[:8] + with_calibrated(GENE_COLUMNS[8:-1]) + GENE_COLUMNS[-1:]
        return list(GENE_COLUMNS)

    def write_record(self, rec: RecordData, gff: GFF3Writer, tsv: TextIO) -> int:
        predictions = decode_genes(
            rec.model, rec.tables, rec.codes, rec.unknown, rec.decode, rec.split_unknown, rec.seqid
        )
        written: list[GenePrediction] = []
        count = write_genes(
            gff,
            tsv,
            rec.model,
            rec.tables,
            rec.codes,
            rec.post,
            rec.groups,
            predictions,
            rec.seqid,
            rec.offset0,
            id_stem=rec.id_stem,
            gene_filter=rec.gene_filter,
            counts=rec.counts,
            written=written,
        )
        if rec.on_genes is not None:
            rec.on_genes(written)
        return count

    def write_stream(
        self, rec: StreamRecord, gff: GFF3Writer, tsv: TextIO, track_sink: TrackSink
    ) -> tuple[int, float, int]:
        from seqstate.kinds.gene_stream import GeneStream

        return GeneStream(rec, gff, tsv).run(track_sink)

    def truth_of(self, path: np.ndarray, model: Model, state_group: np.ndarray) -> list[Any]:
        return genes_from_path(path, model)

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
        # the true genes as a gene -> mRNA -> exon + CDS hierarchy, unscored, numbered
        # on from the record's earlier pieces (numbers[0]: the last gene number written)
        last = [0] if numbers is None else numbers
        if not last:
            last.append(0)
        count = 0
        for gp in truth:
            last[0] += 1
            count += write_gene(gff, None, gp, last[0], seqid, offset0, _unscored)
        return count

    def extra_columns(self, label: str) -> list[str]:
        return label_columns(label)

    def extra_scores(self, label: str, seq: bytes) -> dict[str, Any]:
        return label_scores(label, seq)


def _unscored(line: GeneLine, strand: str, k: int) -> dict | None:
    """The scores of a sampled truth's line: none."""
    return None


#: The gene kind.
GENES = GeneKind()
