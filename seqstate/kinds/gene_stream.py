"""Gene structures of one long record, decoded and scored window by window.

The path comes as pieces from the engine's streaming Viterbi or MEA pass; the windows
pass (:mod:`seqstate.kinds.stream`) gives the track-group posterior, and each gene is
scored on the window that holds it, or on a span view of its own blocks.  The output is
byte-identical to the whole-record path (:func:`seqstate.kinds.genes.write_genes`).
Coordinates: 0-based half-open positions of the annotated stretch.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator
from typing import TextIO

import numpy as np

from seqstate.engine import stream_paths
from seqstate.io.gff3 import GFF3Writer
from seqstate.kinds.genes import (
    GeneLine,
    GenePrediction,
    _memo,
    _Tally,
    decoding_classes,
    exact_allowed,
    exact_scorer,
    gene_masks,
    genes_from_runs,
    run_key,
    strand_columns,
    write_gene,
)
from seqstate.kinds.segments import add_calibrated, segment_scores
from seqstate.kinds.stream import RecordPass, StreamRecord, TrackSink, Window, unknown_count

__all__ = ["GAIN_WINDOW", "GainReader", "GeneStream", "probing"]


#: Longest stretch of class posterior the MEA gain reader holds at once (bases).
GAIN_WINDOW = 1 << 20


class GainReader:
    """Posterior of the decoding classes for the MEA pass, a window at a time.

    Rows asked for are served from the last window computed.  A miss after (or
    across the end of) that window computes the window starting at the block of the
    first row asked for; a miss before it computes the window ending at the block of
    the last row asked for -- so the forward pass in order and the traceback block
    by block from the end each compute every block about once.  float32, as
    ``api.posterior`` gives them to the whole-record path.
    """

    def __init__(self, rp: RecordPass, state_class: np.ndarray, n_classes: int) -> None:
        self.rp, self.cls, self.k = rp, np.asarray(state_class, dtype=np.int64), n_classes
        self.blocks = max(1, min(rp.window_blocks, GAIN_WINDOW // rp.block))
        self.lo = self.hi = 0
        self.values = np.zeros((0, n_classes), dtype=np.float32)

    def __call__(self, a: int, b: int) -> np.ndarray:
        if not (self.lo <= a and b <= self.hi):
            rp, blk = self.rp, self.rp.block
            first, stop = a // blk, (b + blk - 1) // blk
            if b <= self.lo:
                first = min(first, max(0, stop - self.blocks))
            else:
                stop = max(stop, min(rp.nblocks, first + self.blocks))
            self.values = np.zeros((0, self.k), dtype=np.float32)  # free the old window first
            self.lo, self.hi = first * blk, min(rp.n, stop * blk)
            self.values = rp.values(first, stop, self.cls, self.k)
        return self.values[a - self.lo : b - self.lo]


def probing(
    pieces: Iterable[stream_paths.PathPiece],
    key: np.ndarray,
    rec: StreamRecord,
    probes: dict[int, int],
) -> Iterator[stream_paths.PathPiece]:
    """The pieces, unchanged; on the way, the states :func:`genes_from_runs` may ask
    for go into ``probes``: at every known plus-strand CDS position just after an
    unknown base, and every known minus-strand CDS position just before one (the
    5' ends of CDS pieces trimmed at unknown bases)."""
    n = rec.n
    for pc in pieces:
        lo, hi = max(0, pc.start0 - 1), min(n, pc.end0 + 1)
        u = np.asarray(rec.read_symbols(lo, hi)) < 0
        if u.any():
            before = np.concatenate([[False], u[:-1]])
            after = np.concatenate([u[1:], [False]])
            a = pc.start0 - lo
            st = np.asarray(pc.states)
            k = key[st]
            m = pc.end0 - pc.start0
            known = ~u[a : a + m]
            hit = np.flatnonzero(
                known & (((k == 2) & before[a : a + m]) | ((k == 4) & after[a : a + m]))
            )
            for q in hit.tolist():
                probes[pc.start0 + q] = int(st[q])
        yield pc


class GeneStream:
    """Windowed decoding of one record into genes (see :mod:`seqstate.kinds.stream`).

    The path (Viterbi, or MEA over the class posterior read a window at a time)
    comes as pieces from the end; its runs of :func:`run_key` make the genes
    (:func:`genes_from_runs`).  Then the windows pass gives the track-group
    posterior: tracks, and the scores of each gene -- on the window when the gene
    lies inside it, else on a span view of the gene's own blocks.
    """

    def __init__(self, rec: StreamRecord, gff: GFF3Writer, tsv: TextIO) -> None:
        self.rec, self.gff, self.tsv = rec, gff, tsv

    def predictions(self, rp: RecordPass) -> list[GenePrediction]:
        rec = self.rec
        if rec.decode == "viterbi":
            _, pieces = stream_paths.viterbi_pieces(
                rec.tables, rec.n, rec.read_codes, block=rp.block, record=rec.seqid
            )
        else:
            cls, n_cls = decoding_classes(rec.model)
            gain = GainReader(rp, cls, n_cls)
            pieces = stream_paths.mea_pieces(
                rec.tables, rec.n, rec.read_codes, gain, cls, block=rp.block
            )
        key = run_key(rec.model)
        probes: dict[int, int] = {}
        runs = stream_paths.runs_of(probing(pieces, key, rec, probes), key)
        return genes_from_runs(
            runs,
            rec.model,
            rec.n,
            lambda a, b: np.asarray(rec.read_symbols(a, b)) < 0,
            rec.split_unknown,
            probes.__getitem__,
        )

    def run(self, track_sink: TrackSink) -> tuple[int, float, int]:
        rec = self.rec
        rp = RecordPass(rec)
        genes = self.predictions(rp)
        written: list[GenePrediction] = []
        tally = _Tally(rec.gene_filter, rec.counts, written)
        masks = gene_masks(rec.model)
        allowed = exact_allowed(rec.model)
        cols = {strand: strand_columns(rec.groups, strand) for strand in "+-"}
        recal = rec.model.recalibration
        cds_track = (
            {}
            if recal is None
            else {strand: rec.groups[cols[strand][1]].track_name for strand in "+-"}
        )
        n_groups = len(rec.groups)
        count = unknown = 0
        nxt = 0
        for win in rp.windows(rec.state_group, n_groups):
            unknown += unknown_count(rec, win.start0, win.end0)
            for g in range(n_groups):
                track_sink(g, rec.offset0 + win.values0, win.values[:, g])
            while nxt < len(genes) and genes[nxt].span[1] <= win.end0:
                g0, g1 = genes[nxt].span
                # the exact queries read one base beyond each end of the gene
                lo, hi = max(0, g0 - 1), min(rec.n, g1 + 1)
                inside = win.holds(g0, g1) and hi <= win.end0
                inside = inside and (lo > win.origin0 or win.origin0 == 0)
                w = win if inside else rp.span(lo, hi, rec.state_group, n_groups)

                def score_line(ln: GeneLine, strand: str, k: int, w: Window = w) -> dict:
                    gene_cols, cds_col = cols[strand]
                    rows = w.values[ln.start0 - w.values0 : ln.end0 - w.values0]
                    if k == 0:
                        vals = rows[:, gene_cols].sum(axis=1, dtype=np.float64)
                    else:
                        vals = rows[:, cds_col]
                    sc = segment_scores(
                        rec.tables,
                        w.codes,
                        w.view,
                        vals,
                        masks[strand][k],
                        ln.start0 - w.origin0,
                        ln.end0 - w.origin0,
                        log_odds=False,
                    )
                    if recal is not None and k == 1:
                        sc = add_calibrated(sc, vals, recal, cds_track[strand])
                    return sc

                nxt += 1
                scored = _memo(score_line)
                number = tally.keep(genes[nxt - 1], scored)
                if number:
                    exact = exact_scorer(rec.tables, w.codes, w.view, allowed, rec.n, w.origin0)
                    count += write_gene(
                        self.gff,
                        self.tsv,
                        genes[nxt - 1],
                        number,
                        rec.seqid,
                        rec.offset0,
                        scored,
                        id_stem=rec.id_stem,
                        exact=exact,
                        recal=recal,
                        cds_track=cds_track.get(genes[nxt - 1].strand),
                    )
        if rec.on_genes is not None:
            rec.on_genes(written)
        return count, rp.loglik, unknown
