"""Gene structures of one long record, decoded and scored window by window.

The path comes as pieces from the engine's streaming Viterbi or MEA pass; the windows
pass (:mod:`seqstate.kinds.stream`) gives the track-group posterior, and each gene is
scored on the window that holds it, or on a span view of its own blocks.  The output is
byte-identical to the whole-record path (:func:`seqstate.kinds.genes.write_genes`).
Coordinates: 0-based half-open positions of the annotated stretch.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable, Iterable, Iterator
from concurrent.futures import ThreadPoolExecutor, wait
from typing import TextIO

import numpy as np

from seqstate.engine import stream as engine_stream
from seqstate.engine import stream_paths
from seqstate.io.gff3 import GFF3Writer
from seqstate.kinds.gene_writing import _memo, _Tally
from seqstate.kinds.genes import (
    ExactScore,
    GeneLine,
    GenePrediction,
    decoding_classes,
    exact_allowed,
    exact_scorer,
    gene_lines,
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

    def predictions(self, rp: RecordPass | None, block: int) -> list[GenePrediction]:
        """The record's genes, decoded with checkpoint blocks of ``block`` bases (``rp``:
        the record's checkpoints, which posterior decoding needs and Viterbi does not)."""
        rec = self.rec
        if rec.decode == "viterbi":
            _, pieces = stream_paths.viterbi_pieces(
                rec.tables, rec.n, rec.read_codes, block=block, record=rec.seqid
            )
        else:
            assert rp is not None
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
        rp, genes = self.decoded()
        written: list[GenePrediction] = []
        tally = _Tally(rec.gene_filter, rec.counts, written)
        self.masks = gene_masks(rec.model)
        self.allowed = exact_allowed(rec.model)
        self.cols = {strand: strand_columns(rec.groups, strand) for strand in "+-"}
        recal = rec.model.recalibration
        self.cds_track = (
            {}
            if recal is None
            else {strand: rec.groups[self.cols[strand][1]].track_name for strand in "+-"}
        )
        n_groups = len(rec.groups)
        count = unknown = 0
        nxt = 0
        with ThreadPoolExecutor(max_workers=1, thread_name_prefix="seqstate-genes") as pool:
            for win in rp.windows(rec.state_group, n_groups):
                unknown += unknown_count(rec, win.start0, win.end0)
                for g in range(n_groups):
                    track_sink(g, rec.offset0 + win.values0, win.values[:, g])
                batch: list[tuple[GenePrediction, Window]] = []
                while nxt < len(genes) and genes[nxt].span[1] <= win.end0:
                    g0, g1 = genes[nxt].span
                    # the exact queries read one base beyond each end of the gene
                    lo, hi = max(0, g0 - 1), min(rec.n, g1 + 1)
                    inside = win.holds(g0, g1) and hi <= win.end0
                    inside = inside and (lo > win.origin0 or win.origin0 == 0)
                    w = win if inside else rp.span(lo, hi, rec.state_group, n_groups)
                    batch.append((genes[nxt], w))
                    nxt += 1
                for (gp, _), (scored, exact) in zip(
                    batch, self.scorers(batch, rp, win, pool), strict=True
                ):
                    number = tally.keep(gp, scored)
                    if number:
                        count += write_gene(
                            self.gff,
                            self.tsv,
                            gp,
                            number,
                            rec.seqid,
                            rec.offset0,
                            scored,
                            id_stem=rec.id_stem,
                            exact=exact,
                            recal=recal,
                            cds_track=self.cds_track.get(gp.strand),
                        )
        if rec.on_genes is not None:
            rec.on_genes(written)
        return count, rp.loglik, unknown

    def decoded(self) -> tuple[RecordPass, list[GenePrediction]]:
        """The record's checkpoints and genes.

        With two threads a Viterbi decoding runs on the second thread while this one
        makes the forward and then the backward checkpoints (three passes on two threads
        instead of two, then one); a failing record raises the checkpoints' error, as on
        one thread.
        """
        rec = self.rec
        if rec.threads < 2 or rec.decode != "viterbi":
            rp = RecordPass(rec)
            return rp, self.predictions(rp, rp.block)
        block = engine_stream.block_of(rec.n, rec.block)
        with ThreadPoolExecutor(max_workers=1, thread_name_prefix="seqstate-viterbi") as pool:
            fut = pool.submit(self.predictions, None, block)
            try:
                rp = RecordPass(rec, threads=1)
            except BaseException:
                fut.cancel()
                wait([fut])
                raise
            genes = fut.result()
        assert rp.block == block
        return rp, genes

    def scorer(self, w: Window) -> tuple[ScoreLine, ExactScore]:
        """The (remembering) line scores and exact probabilities of genes on ``w``."""
        rec, cols, masks, recal = self.rec, self.cols, self.masks, self.rec.model.recalibration

        def score_line(ln: GeneLine, strand: str, k: int) -> dict:
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
                sc = add_calibrated(sc, vals, recal, self.cds_track[strand])
            return sc

        exact = exact_scorer(rec.tables, w.codes, w.view, self.allowed, rec.n, w.origin0)
        return _memo(score_line), _memo_exact(exact)

    def scorers(
        self,
        batch: list[tuple[GenePrediction, Window]],
        rp: RecordPass,
        win: Window,
        pool: ThreadPoolExecutor,
    ) -> list[tuple[ScoreLine, ExactScore]]:
        """One scorer per gene of ``batch`` (gene, the window it is scored on).

        With two threads the genes after the middle of the batch (by length) are scored
        ahead on the second thread, on a view of ``win`` of its own (a view's query
        vectors are its own; span windows are one gene's), while this thread scores the
        first part; every score is what the lazy scorer gives, to the bit (the engine's
        queries do not depend on their order).
        """
        if self.rec.threads < 2 or len(batch) < SCORE_AHEAD_MIN:
            return [self.scorer(w) for _, w in batch]
        sizes = np.cumsum([gp.span[1] - gp.span[0] for gp, _ in batch])
        cut = int(np.searchsorted(sizes, sizes[-1] / 2.0)) + 1
        blk = rp.block
        own = engine_stream.view(
            rp.tables, rp.ck, win.codes, win.origin0 // blk, (win.end0 + blk - 1) // blk, None
        )
        win2 = dataclasses.replace(win, view=own)
        second = [(gp, win2 if w is win else w) for gp, w in batch[cut:]]
        fut = pool.submit(self._ahead, second)
        try:
            first = self._ahead(batch[:cut])
        finally:
            later = fut.result()
        return first + later

    def _ahead(
        self, batch: list[tuple[GenePrediction, Window]]
    ) -> list[tuple[ScoreLine, ExactScore]]:
        out = []
        for gp, w in batch:
            scored, exact = self.scorer(w)
            for ln in gene_lines(gp, "", 1):
                scored(ln, gp.strand, 0 if ln.type in ("gene", "mRNA") else 1)
                if ln.type != "gene":
                    exact(ln, gp)
            out.append((scored, exact))
        return out


#: Fewest genes in a window worth scoring on two threads.
SCORE_AHEAD_MIN = 4

#: ``score_line(line, strand, k)``: a line's posterior scores (see :func:`write_gene`).
ScoreLine = Callable[[GeneLine, str, int], dict | None]


def _memo_exact(exact: ExactScore) -> ExactScore:
    """``exact`` remembering its answers for one gene (exon and CDS lines share one)."""
    seen: dict[tuple[bool, int, int], float | None] = {}

    def remembered(ln: GeneLine, gene: GenePrediction) -> float | None:
        key = (ln.type == "mRNA", ln.start0, ln.end0)
        if key not in seen:
            seen[key] = exact(ln, gene)
        return seen[key]

    return remembered
