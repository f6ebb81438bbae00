"""Record decoding in windows: one long record annotated in bounded memory.

The whole-record path (:meth:`seqstate.kinds.base.Kind.write_record`) holds the
record's codes and an N x groups posterior.  Here a record is decoded from the
engine's checkpoints (:func:`seqstate.engine.stream.checkpoints`, one forward and
one backward pass), then *windows* of posterior values are made in record order
(:meth:`RecordPass.windows`) and each kind turns them into features, scores and
tracks.  The output is byte-identical to the whole-record path.

Coordinates: 0-based half-open ``[start0, end0)`` positions of the annotated
stretch (``offset0`` bases into the record; the track sink gets record
coordinates, see :data:`TrackSink`).  A *window* is a run of whole checkpoint
blocks; each window carries an :class:`api.Posterior` *view* over its blocks
plus ONE margin block before them, so segment queries (segment probability,
log-odds) on any segment inside the window are bit-identical to whole-record
ones (the engine's rule: local start >= 1, or the view starts at position 0).
A feature that crosses a window edge is scored on a span view of its own blocks
(:meth:`RecordPass.span`).

Memory: O(window * columns) for one window's values and codes, the checkpoints
(O(N / block * states)), the features of the record, and per feature crossing a
window edge O(feature length * columns).  Never an O(N) array.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, TextIO

import numpy as np

from seqstate.engine import api
from seqstate.engine import stream as engine_stream
from seqstate.io.gff3 import GFF3Writer
from seqstate.kinds.base import Group, RecordData
from seqstate.model import Model

if TYPE_CHECKING:
    from seqstate.kinds.base import Kind

__all__ = [
    "DEFAULT_WINDOW",
    "RecordPass",
    "StreamRecord",
    "TrackSink",
    "Window",
    "write_stream_record",
    "write_whole",
]

#: Default window length in bases (rounded down to whole checkpoint blocks).
DEFAULT_WINDOW = 1 << 22

#: ``track_sink(group_index, start0, values)``: ``values[i]`` is the posterior of track
#: group ``group_index`` at RECORD position ``start0 + i`` (0-based; ``offset0`` already
#: added).  Called for every group, window after window, in record order; ``values`` is a
#: float32 view that the sink must not keep beyond the call unless it copies it.
TrackSink = Callable[[int, int, np.ndarray], None]


@dataclass
class StreamRecord:
    """One record (or region of it) as the windowed decoders read it.

    ``n`` is the length of the annotated stretch, ``offset0`` its start in record
    ``seqid``.  The readers take 0-based half-open positions ``[a, b)`` of the
    stretch: ``read_bases`` its raw bases (bytes), ``read_codes`` its emission codes
    (as ``api.encode`` of the whole stretch gives them, order-k context included),
    ``read_symbols`` its symbol indices (negative for an unknown base); the readers
    may be called from two threads at once (annotate's read by position).
    ``decode``, ``min_posterior``, ``min_length`` and ``split_unknown`` are annotate's
    options; ``threads`` (1 or 2) the threads the engine may use; ``window`` the
    window length in bases (whole blocks; at least one block); ``block`` the
    checkpoint block length (None: the engine's default for ``n``).
    """

    model: Model
    tables: api.EngineTables
    groups: list[Group]
    state_group: np.ndarray
    seqid: str
    n: int
    offset0: int
    read_bases: Callable[[int, int], bytes]
    read_codes: Callable[[int, int], np.ndarray]
    read_symbols: Callable[[int, int], np.ndarray]
    decode: str
    min_posterior: float
    min_length: int
    split_unknown: int
    threads: int = 1
    window: int = DEFAULT_WINDOW
    block: int | None = None
    #: called with the record's written genes (gene kinds; for CDS and protein files)
    on_genes: Callable[[list[Any]], None] | None = None
    #: feature IDs start with this (None: ``seqid``); ``ID:START-END`` for a region run
    id_stem: str | None = None
    #: the gene kind's filters (:class:`seqstate.kinds.genes.GeneFilter`; None: none)
    gene_filter: Any = None
    #: counts the kind reports for the stretch (gene kinds: genes, mrnas, filtered_*)
    counts: dict[str, int] = field(default_factory=dict)


@dataclass
class Window:
    """Posterior values and a segment-query view over a run of whole blocks.

    ``values`` rows are the positions ``[values0, end0)``; ``codes`` and ``view`` are
    in local coordinates whose 0 is position ``origin0`` (``origin0 <= values0``; one
    margin block before ``values0`` unless ``values0`` is 0).  ``start0`` is the first
    position this window is responsible for (features starting there or later and
    ending by ``end0`` are scored on it).
    """

    start0: int
    end0: int
    origin0: int
    values0: int
    codes: np.ndarray
    values: np.ndarray
    view: api.Posterior

    def holds(self, start0: int, end0: int) -> bool:
        """Whether the segment ``[start0, end0)`` can be scored on this window."""
        return self.start0 <= start0 and end0 <= self.end0

    def column(self, g: int, start0: int, end0: int) -> np.ndarray:
        """Values of column ``g`` at positions ``[start0, end0)`` (a view, float32)."""
        return self.values[start0 - self.values0 : end0 - self.values0, g]


class RecordPass:
    """The checkpoints of one record and the windows and span views made from them."""

    def __init__(self, rec: StreamRecord, threads: int | None = None) -> None:
        """The checkpoints of ``rec`` on ``threads`` threads (None: ``rec.threads``; the
        windows use ``rec.threads`` either way)."""
        if rec.n <= 0:
            raise ValueError("empty record")
        self.rec = rec
        self.tables = rec.tables
        self.ck = engine_stream.checkpoints(
            rec.tables,
            rec.n,
            rec.read_codes,
            block=rec.block,
            threads=rec.threads if threads is None else threads,
            record=rec.seqid,
        )
        self.n = rec.n
        self.block = int(self.ck.block)
        self.nblocks = (self.n + self.block - 1) // self.block
        self.window_blocks = max(1, int(rec.window) // self.block)

    @property
    def loglik(self) -> float:
        """The record's log-likelihood (natural log)."""
        return float(self.ck.loglik)

    def _make(self, vb: int, first: int, stop: int, group: np.ndarray, n_groups: int) -> Window:
        # values of blocks [first, stop); codes and the view from block vb <= first
        blk, n = self.block, self.n
        origin0, values0, end0 = vb * blk, first * blk, min(n, stop * blk)
        codes = np.ascontiguousarray(self.rec.read_codes(origin0, end0))
        values = engine_stream.posterior_blocks(
            self.tables,
            self.ck,
            codes[values0 - origin0 :],
            first,
            stop,
            group,
            n_groups,
            threads=self.rec.threads,
        )
        view = engine_stream.view(self.tables, self.ck, codes, vb, stop, None)
        return Window(values0, end0, origin0, values0, codes, values, view)

    def values(self, first: int, stop: int, group: np.ndarray, n_groups: int) -> np.ndarray:
        """Posterior values of blocks ``[first, stop)`` (rows: positions
        ``[first * block, min(n, stop * block))``; columns as ``group`` says), no view."""
        blk = self.block
        codes = np.ascontiguousarray(self.rec.read_codes(first * blk, min(self.n, stop * blk)))
        return engine_stream.posterior_blocks(
            self.tables,
            self.ck,
            codes,
            first,
            stop,
            np.asarray(group, dtype=np.int64),
            n_groups,
            threads=self.rec.threads,
        )

    def windows(self, group: np.ndarray, n_groups: int) -> Iterator[Window]:
        """Windows of ``window_blocks`` blocks over the record, in order (``group`` as in
        ``api.posterior``: state -> column, -1 to drop), each with one margin block."""
        group = np.asarray(group, dtype=np.int64)
        for first in range(0, self.nblocks, self.window_blocks):
            stop = min(self.nblocks, first + self.window_blocks)
            yield self._make(max(0, first - 1), first, stop, group, n_groups)

    def span(self, start0: int, end0: int, group: np.ndarray, n_groups: int) -> Window:
        """A window for the one segment ``[start0, end0)``: values of the blocks holding
        it, the view from the block holding ``start0 - 1`` (local start >= 1)."""
        blk = self.block
        first = start0 // blk
        stop = (end0 + blk - 1) // blk
        vb = (start0 - 1) // blk if start0 > 0 else 0
        win = self._make(vb, first, stop, np.asarray(group, dtype=np.int64), n_groups)
        win.start0, win.end0 = start0, end0
        return win


def write_whole(
    kind: Kind, rec: StreamRecord, gff: GFF3Writer, tsv: TextIO, track_sink: TrackSink
) -> tuple[int, float, int]:
    """The whole-record path on a :class:`StreamRecord` (reads the whole stretch; for
    kinds without a windowed decoder, and for short records)."""
    n = rec.n
    codes = np.ascontiguousarray(rec.read_codes(0, n))
    sym = np.asarray(rec.read_symbols(0, n))
    post = api.posterior(
        rec.tables, codes, group=rec.state_group, n_groups=len(rec.groups), record=rec.seqid
    )
    data = RecordData(
        model=rec.model,
        tables=rec.tables,
        groups=rec.groups,
        state_group=rec.state_group,
        seqid=rec.seqid,
        offset0=rec.offset0,
        seq=rec.read_bases(0, n),
        codes=codes,
        symbols=sym,
        post=post,
        decode=rec.decode,
        min_posterior=rec.min_posterior,
        min_length=rec.min_length,
        split_unknown=rec.split_unknown,
        on_genes=rec.on_genes,
        id_stem=rec.id_stem,
        gene_filter=rec.gene_filter,
        counts=rec.counts,
    )
    count = kind.write_record(data, gff, tsv)
    for g in range(len(rec.groups)):
        track_sink(g, rec.offset0, post.values[:, g])
    return count, float(post.loglik), int(np.count_nonzero(sym < 0))


def write_stream_record(
    kind: Kind, rec: StreamRecord, gff: GFF3Writer, tsv: TextIO, track_sink: TrackSink
) -> tuple[int, float, int]:
    """Decode, score and write one long record window by window.

    Returns ``(features written, log-likelihood (natural log), unknown bases)``; the
    GFF3 and TSV lines and the track values are byte-identical to the whole-record
    path (:meth:`Kind.write_record` plus ``api.posterior`` values).
    ``track_sink(group_index, start0, values)`` gets every track group's posterior,
    window by window in record order (see :data:`TrackSink`).
    Raises :class:`seqstate.errors.ImpossibleSequenceError` naming the record (before
    anything is written) when the record has probability zero under the model.
    """
    return kind.write_stream(rec, gff, tsv, track_sink)


def unknown_count(rec: StreamRecord, start0: int, end0: int) -> int:
    """Unknown bases (negative symbols) in ``[start0, end0)`` of the stretch."""
    return int(np.count_nonzero(np.asarray(rec.read_symbols(start0, end0)) < 0))
