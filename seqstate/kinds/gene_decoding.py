"""Gene decoding: a state path -> gene structures, the decoding classes, and gene lines.

:func:`decode_genes` decodes one encoded record (Viterbi, or the maximum expected
accuracy path over the classes of :func:`decoding_classes`); :func:`genes_from_path`
and :func:`genes_from_runs` turn a path (whole, or as runs of states) into
:class:`GenePrediction` (0-based half-open, plus-strand coordinates), cut at runs of
unknown bases; :func:`cds_phases` gives GFF3 phases; :func:`gene_lines` a gene's
gene -> mRNA -> exon + CDS lines with their IDs, in file order.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from seqstate.engine import api, mea
from seqstate.model import Model

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
